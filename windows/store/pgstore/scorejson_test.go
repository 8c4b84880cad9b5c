package pgstore

import (
	"context"
	"encoding/json"
	"maps"
	"math/rand/v2"
	"strconv"
	"testing"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
)

// TestParseScoresMatchesEncodingJSON checks store.ParseScores against
// encoding/json (the reference decoder) on hand-picked texts, on random
// score maps as PostgreSQL prints them after a round trip through jsonb,
// and on texts only encoding/json may accept or refuse.
func TestParseScoresMatchesEncodingJSON(t *testing.T) {
	texts := []string{
		`{}`, ` { } `, `{"fraud": 0.8, "legit": 0.2}`, `{"a":1,"b":-0.5e-3,"c":1E+2}`,
		`{"esc\"aped": 0.1}`, `{"tab\tkey": 0.1}`, `{"ünï": 0.25}`, `{"a": 0.1, "a": 0.3}`,
		`{"a": 0.1,}`, `{"a": .5}`, `{"a": +1}`, `{"a": "x"}`, `{"a": null}`, `{"a": 1} x`, `[1]`, `{"a" 1}`,
	}
	ctx := context.Background()
	conn, err := pgx.Connect(ctx, pgtest.BaseURL(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	rng := rand.New(rand.NewPCG(5, 9))
	for range 300 {
		scores := map[string]float64{}
		for c := range 1 + rng.IntN(12) {
			scores["class-"+strconv.Itoa(c)] = [...]float64{rng.Float64(), rng.Float64() * 1e-7, 1, 0, 1 - rng.Float64()}[rng.IntN(5)]
		}
		var printed string
		if err := conn.QueryRow(ctx, `SELECT $1::text::jsonb::text`, string(appendScores(nil, scores))).Scan(&printed); err != nil {
			t.Fatal(err)
		}
		texts = append(texts, printed)
	}
	for _, text := range texts {
		var want map[string]float64
		wantErr := json.Unmarshal([]byte(text), &want)
		got, err := store.ParseScores([]byte(text))
		if (err != nil) != (wantErr != nil) || !maps.Equal(got, want) {
			t.Errorf("store.ParseScores(%s) = %v, %v; encoding/json gives %v, %v", text, got, err, want, wantErr)
		}
	}
}
