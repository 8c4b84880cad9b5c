package pgstore

import (
	"context"
	"fmt"
	"slices"
	"testing"
	"time"

	"github.com/jackc/pgx/v5"
)

func TestScratchCopy(t *testing.T) {
	ctx := context.Background()
	s := newStore(t)
	d := loadData{n: 1000000, start: time.Date(2026, 3, 2, 0, 0, 0, 0, time.UTC), span: 72 * time.Hour}
	ddl := map[string]string{
		"bare":    `CREATE TABLE bare (model_id integer, id text, at timestamptz, bucket timestamptz, segment text, predicted text, scores jsonb)`,
		"narrow":  `CREATE TABLE narrow (pkey bigint, bucket timestamptz, at timestamptz, model_id integer, id text COLLATE "C", segment text COLLATE "C", predicted text COLLATE "C", scores jsonb)`,
		"pk":      `CREATE TABLE pk (pkey bigint, bucket timestamptz, at timestamptz, model_id integer, id text COLLATE "C", segment text COLLATE "C", predicted text COLLATE "C", scores jsonb, PRIMARY KEY (model_id, id))`,
		"pkbrin":  `CREATE TABLE pkbrin (pkey bigint, bucket timestamptz, at timestamptz, model_id integer, id text COLLATE "C", segment text COLLATE "C", predicted text COLLATE "C", scores jsonb, PRIMARY KEY (model_id, id)); CREATE INDEX ON pkbrin USING brin (bucket) WITH (pages_per_range = 32)`,
		"pkbytea": `CREATE TABLE pkbytea (pkey bigint, bucket timestamptz, at timestamptz, model_id integer, id text COLLATE "C", segment text COLLATE "C", predicted text COLLATE "C", scores bytea, PRIMARY KEY (model_id, id))`,
	}
	names := []string{"bare", "narrow", "pk", "pkbrin", "pkbytea"}
	for _, n := range names {
		if _, err := s.pool.Exec(ctx, ddl[n]); err != nil {
			t.Fatal(err)
		}
	}
	times := map[string][]time.Duration{}
	for lo := 0; lo < 300000; lo += loadBatch {
		for _, n := range names {
			rows := make([][]any, 0, loadBatch)
			for i := lo; i < lo+loadBatch; i++ {
				p := d.prediction(i)
				sc, _ := encodeScores(p.Scores)
				if n == "bare" {
					rows = append(rows, []any{int32(1), p.ID, p.At, p.Bucket, p.Segment, p.Predicted, sc})
				} else {
					rows = append(rows, []any{int64(i), p.Bucket, p.At, int32(1), p.ID, p.Segment, p.Predicted, sc})
				}
			}
			cols := []string{"pkey", "bucket", "at", "model_id", "id", "segment", "predicted", "scores"}
			if n == "bare" {
				cols = []string{"model_id", "id", "at", "bucket", "segment", "predicted", "scores"}
			}
			start := time.Now()
			if _, err := s.pool.CopyFrom(ctx, pgx.Identifier{n}, cols, pgx.CopyFromRows(rows)); err != nil {
				t.Fatal(err)
			}
			times[n] = append(times[n], time.Since(start))
		}
	}
	for _, n := range names {
		ts := times[n]
		slices.Sort(ts)
		fmt.Printf("%-8s median %v\n", n, ts[len(ts)/2])
	}
}
