package collector

import (
	"bytes"
	"context"
	"fmt"
	"io"
	"testing"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"github.com/classwatch/classwatch/windows/store/sqlitestore"
	"github.com/classwatch/classwatch/windows/store/sqlitestore/sqlitestoretest"
)

// benchLines returns n prediction lines of a fictional card-screening
// model, with scores and segments, as NDJSON.
func benchLines(n, offset int) []byte {
	var buf bytes.Buffer
	start := time.Date(2026, 3, 1, 0, 0, 0, 0, time.UTC)
	for i := range n {
		at := start.Add(time.Duration(offset+i) * time.Second).Format(time.RFC3339)
		pred, s := "legit", 0.08
		if i%17 == 0 {
			pred, s = "fraud", 0.93
		}
		fmt.Fprintf(&buf, `{"model":"card-fraud","id":"txn-%09d","at":%q,"predicted":%q,"scores":{"fraud":%.2f,"legit":%.2f},"segment":"web"}`+"\n",
			offset+i, at, pred, s, 1-s)
	}
	return buf.Bytes()
}

// BenchmarkDecodeValidate measures splitting and validating NDJSON
// prediction lines, without models, classes or the store.
func BenchmarkDecodeValidate(b *testing.B) {
	const n = 10000
	data := benchLines(n, 0)
	now := time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC)
	b.SetBytes(int64(len(data)))
	b.ReportAllocs()
	lines := 0
	for b.Loop() {
		src := newLineSource(bytes.NewReader(data), NDJSON, DefaultMaxLineBytes)
		for {
			_, line, err := src.next()
			if err == io.EOF {
				break
			}
			if err != nil {
				b.Fatal(err)
			}
			if _, err := parsePrediction(line, now, DefaultMaxFuture); err != nil {
				b.Fatal(err)
			}
			lines++
		}
	}
	b.ReportMetric(float64(lines)/b.Elapsed().Seconds(), "lines/s")
}

// BenchmarkIngestSQLite measures the whole path of a bulk backfill into a
// SQLite file: decode, validate, resolve, commit in batches of 1000 lines.
func BenchmarkIngestSQLite(b *testing.B) {
	ctx := context.Background()
	st := sqlitestoretest.Open(b, sqlitestore.Options{})
	c, err := New(Options{
		Store:      st,
		Registerer: prometheus.NewRegistry(),
		Models:     []ModelPolicy{{Name: "card-fraud", Classes: []string{"legit", "fraud"}}},
		Now:        func() time.Time { return time.Date(2026, 6, 1, 0, 0, 0, 0, time.UTC) },
	})
	if err != nil {
		b.Fatal(err)
	}
	const n = 10000
	lines, offset := 0, 0
	b.ReportAllocs()
	for b.Loop() {
		b.StopTimer()
		data := benchLines(n, offset)
		offset += n
		b.StartTimer()
		res, err := c.Ingest(ctx, Predictions, bytes.NewReader(data), BatchOptions{BatchLines: 1000})
		if err != nil || res.Accepted != n {
			b.Fatalf("ingest: %+v %v", res.Accepted, err)
		}
		lines += n
	}
	b.ReportMetric(float64(lines)/b.Elapsed().Seconds(), "lines/s")
}
