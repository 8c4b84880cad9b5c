package sqlitestore

import (
	"encoding/json"
	"maps"
	"math/rand/v2"
	"strconv"
	"testing"

	"github.com/classwatch/classwatch/windows/store"
)

// TestParseScoresReadsStoredText checks store.ParseScores against
// encoding/json (the reference decoder) on the text this store writes:
// random score maps, with plain keys and with keys that need escaping.
func TestParseScoresReadsStoredText(t *testing.T) {
	rng := rand.New(rand.NewPCG(3, 7))
	for i := range 500 {
		scores := map[string]float64{}
		for c := range 1 + rng.IntN(12) {
			key := "queue-" + strconv.Itoa(c)
			if i%7 == 0 {
				key = "q<\"" + strconv.Itoa(c) + "\">"
			}
			scores[key] = [...]float64{rng.Float64(), rng.Float64() * 1e-9, 1, 0, 1 - rng.Float64()}[rng.IntN(5)]
		}
		text, err := appendScores(nil, scores)
		if err != nil {
			t.Fatal(err)
		}
		var want map[string]float64
		if err := json.Unmarshal(text, &want); err != nil {
			t.Fatal(err)
		}
		got, err := store.ParseScores(text)
		if err != nil || !maps.Equal(got, want) || !maps.Equal(got, scores) {
			t.Fatalf("ParseScores(%s) = %v, %v; encoding/json gives %v (written from %v)", text, got, err, want, scores)
		}
	}
}
