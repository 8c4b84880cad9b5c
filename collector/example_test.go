package collector_test

import (
	"context"
	"fmt"
	"io"
	"log"
	"net/http"
	"net/http/httptest"
	"os"
	"path/filepath"
	"strings"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/collector"
	"github.com/classwatch/classwatch/windows/store/sqlitestore"
)

// Example wires a collector to an embedded store and an HTTP server, then
// pushes two predictions of a fictional card-screening model, one of them
// with a class the model does not have.
func Example() {
	ctx := context.Background()
	dir, err := os.MkdirTemp("", "classwatch-example")
	if err != nil {
		log.Fatal(err)
	}
	defer os.RemoveAll(dir)
	st, err := sqlitestore.Open(ctx, filepath.Join(dir, "classwatch.db"), sqlitestore.Options{})
	if err != nil {
		log.Fatal(err)
	}
	defer st.Close()
	if err := st.Migrate(ctx); err != nil {
		log.Fatal(err)
	}

	col, err := collector.New(collector.Options{
		Store:      st,
		Models:     []collector.ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}}},
		Registerer: prometheus.NewRegistry(),
	})
	if err != nil {
		log.Fatal(err)
	}
	if err := col.Prepare(ctx); err != nil {
		log.Fatal(err)
	}
	mux := http.NewServeMux()
	col.Register(mux)
	srv := httptest.NewServer(mux)
	defer srv.Close()

	body := `{"model":"card-fraud","id":"txn-88412","predicted":"fraud","scores":{"fraud":0.91,"legit":0.09}}
{"model":"card-fraud","id":"txn-88413","predicted":"chargeback"}
`
	resp, err := http.Post(srv.URL+"/v1/predictions", "application/x-ndjson", strings.NewReader(body))
	if err != nil {
		log.Fatal(err)
	}
	defer resp.Body.Close()
	out, _ := io.ReadAll(resp.Body)
	fmt.Print(resp.StatusCode, " ", string(out))
	// Output:
	// 200 {"accepted":1,"duplicates":0,"rejected":[{"line":2,"error":"class \"chargeback\" is not registered for model \"card-fraud\""}],"rejected_omitted":0}
}
