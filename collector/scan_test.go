package collector

import (
	"fmt"
	"reflect"
	"slices"
	"testing"

	"github.com/classwatch/classwatch/windows/store"
)

// Lines of the fast path's shape: predictions, then labels.
var (
	scanPredictions = []string{
		`{"model":"card-fraud","id":"txn-1","at":"2026-03-01T12:00:00Z","predicted":"fraud","scores":{"fraud":0.91,"legit":0.09},"segment":"web"}`,
		` { "model" : "card-fraud" , "id" : "txn-2" , "predicted" : "legit" , "scores" : { } } `,
		`{"model":"card-fraud","id":"txn-6","predicted":"legit","scores":{"legit":1.5e0,"fraud":-0,"x":1E-2,"y":-12.5E+3}}`,
		`{}`,
	}
	scanLabels = []string{
		`{"model":"card-fraud","id":"c","actual":"legit","at":"2026-03-01T12:10:00Z"}`,
		"{\"model\":\"caisse-\u00e9\",\"id\":\"\u00fc-1\",\"actual\":\"l\u00e9gitime\"}",
	}
)

// scanMisses are lines that must leave the fast path for decodeLine,
// which accepts some of them and rejects the rest.
var scanMisses = []string{
	`{"model":"card-fraud","id":"txn-6","predicted":"legit","scores":{"legit":1,"legit":0.5}}`,
	`{"model":"card-fraud","id":"txn-3","predicted":"legit"`,
	`{"model":"card-fraud","id":"txn-4","predicted":"legit","predicition":"fraud"}`,
	`{"Model":"card-fraud","ID":"txn-5","Predicted":"legit"}`,
	`{"model":"card-fraud","id":"txn-6","predicted":"legit","scores":{"legit":1},"scores":{"fraud":0}}`,
	`{"model":"card-fraud","model":"other","id":"txn-7","predicted":"legit"}`,
	`{"model":"card-fraud","id":7,"predicted":"legit"}`,
	`{"model":"card-fraud","id":"txn-8","predicted":null,"scores":null}`,
	`{"model":"card-\u0066raud","id":"txn-9","predicted":"legit"}`,
	`{"model":"card-fraud","id":"txn-10","scores":{"legit":1e999}}`,
	`{"model":"card-fraud","id":"txn-11","scores":{"legit":01}}`,
	`{"model":"card-fraud","id":"txn-12","scores":{"legit":-}}`,
	`{"model":"card-fraud","id":"txn-13","scores":{"legit":.5}}`,
	`{"model":"card-fraud","id":"txn-14","predicted":"legit"} {"x":1}`,
	`{"model":"card-fraud","id":"txn-15","predicted":"legit"}x`,
	"{\"model\":\"\xff\",\"id\":\"a\"}",
	"{\"model\":\"card-fraud\",\"id\":\"a\tb\"}",
	`[1,2]`,
	``,
	`"text"`,
}

// TestScanShapes checks which lines take the fast path, so that
// FuzzScanLine's comparison is not empty and the fallback is exercised.
func TestScanShapes(t *testing.T) {
	for _, s := range scanPredictions {
		if _, ok := scanPrediction(s); !ok {
			t.Errorf("scanPrediction(%s) fell back", s)
		}
	}
	for _, s := range scanLabels {
		if _, ok := scanLabel(s); !ok {
			t.Errorf("scanLabel(%s) fell back", s)
		}
	}
	for _, s := range scanMisses {
		if _, ok := scanPrediction(s); ok {
			t.Errorf("scanPrediction(%s) took the fast path; want decodeLine", s)
		}
		if _, ok := scanLabel(s); ok {
			t.Errorf("scanLabel(%s) took the fast path; want decodeLine", s)
		}
	}
}

// FuzzScanLine checks that whatever the fast path accepts, decodeLine
// accepts too and decodes to the same values.
func FuzzScanLine(f *testing.F) {
	for _, seeds := range [][]string{scanPredictions, scanLabels, scanMisses} {
		for _, s := range seeds {
			f.Add(s)
		}
	}
	f.Fuzz(func(t *testing.T, s string) {
		if got, ok := scanPrediction(s); ok {
			var want predictionLine
			if err := decodeLine([]byte(s), &want, predictionFields, "scores"); err != nil {
				t.Fatalf("scanPrediction accepted %q, decodeLine refused it: %v", s, err)
			}
			if !reflect.DeepEqual(got, want) {
				t.Fatalf("scanPrediction(%q) = %+v, decodeLine gives %+v", s, got, want)
			}
		}
		if got, ok := scanLabel(s); ok {
			var want labelLine
			if err := decodeLine([]byte(s), &want, labelFields, ""); err != nil {
				t.Fatalf("scanLabel accepted %q, decodeLine refused it: %v", s, err)
			}
			if got != want {
				t.Fatalf("scanLabel(%q) = %+v, decodeLine gives %+v", s, got, want)
			}
		}
	})
}

// TestCheckScoresOrder checks that of several bad scores the message names
// the class that sorts first, whatever the map's iteration order.
func TestCheckScoresOrder(t *testing.T) {
	scores := map[string]float64{"torn": 1.5, "crushed": 0.2, "dented": -0.1, "wet": 2, "": 0.5}
	for range 20 {
		err := checkScores(scores)
		if got, want := fmt.Sprint(err), `"scores": class name is empty`; got != want {
			t.Fatalf("checkScores = %q, want %q", got, want)
		}
	}
	delete(scores, "")
	for range 20 {
		err := checkScores(scores)
		if got, want := fmt.Sprint(err), `"scores": "dented" is -0.1, outside [0, 1]`; got != want {
			t.Fatalf("checkScores = %q, want %q", got, want)
		}
	}
	if err := checkScores(map[string]float64{"crushed": 0, "intact": 1}); err != nil {
		t.Errorf("checkScores of good scores = %v", err)
	}
}

// TestBatchReset checks that a batch kept for reuse holds no line of the
// batch before it.
func TestBatchReset(t *testing.T) {
	b := &batch{}
	for i := range 3000 {
		b.preds = append(b.preds, store.Prediction{Model: "dock-01", ID: fmt.Sprint(i)})
		b.items = append(b.items, item{line: i + 1, classes: b.classList("dented", map[string]float64{"wet": 0.1, "intact": 0.2})})
	}
	b.truncate(10, Predictions)
	b.reset()
	if len(b.items) != 0 || len(b.preds) != 0 || len(b.classBuf) != 0 || b.lines != 0 {
		t.Fatalf("reset batch holds %d items, %d predictions, %d classes, %d lines", len(b.items), len(b.preds), len(b.classBuf), b.lines)
	}
	for i, p := range b.preds[:cap(b.preds)] {
		if p.ID != "" {
			t.Fatalf("reset batch keeps prediction %d: %+v", i, p)
		}
	}
	for i, cl := range b.classBuf[:cap(b.classBuf)] {
		if cl != "" {
			t.Fatalf("reset batch keeps class %d: %q", i, cl)
		}
	}
	got := b.classList("wet", map[string]float64{"wet": 0.5, "torn": 0.1, "crushed": 0.4})
	if want := []string{"wet", "crushed", "torn"}; !slices.Equal(got, want) {
		t.Errorf("class list = %q, want %q", got, want)
	}
}
