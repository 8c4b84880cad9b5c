package pgtest

import (
	"context"
	"testing"

	"github.com/jackc/pgx/v5"
)

func TestMain(m *testing.M) { Main(m) }

// TestURLIsolates checks that each URL names an empty schema of its own,
// and that the schema is gone after its test.
func TestURLIsolates(t *testing.T) {
	ctx := context.Background()
	var first string
	t.Run("first", func(t *testing.T) {
		url := URL(t)
		conn, err := pgx.Connect(ctx, url)
		if err != nil {
			t.Fatal(err)
		}
		defer conn.Close(ctx)
		if err := conn.QueryRow(ctx, `SELECT current_schema()`).Scan(&first); err != nil {
			t.Fatal(err)
		}
		if _, err := conn.Exec(ctx, `CREATE TABLE marker (x int)`); err != nil {
			t.Fatal(err)
		}
	})
	if first == "" || first == "public" {
		t.Fatalf("URL's current schema = %q, want a schema of the test's own", first)
	}

	conn, err := pgx.Connect(ctx, URL(t))
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close(ctx)
	var second string
	var tables int
	if err := conn.QueryRow(ctx, `SELECT current_schema(), (SELECT count(*) FROM pg_tables WHERE schemaname = current_schema())`).Scan(&second, &tables); err != nil {
		t.Fatal(err)
	}
	if second == first || tables != 0 {
		t.Errorf("second URL: schema %q with %d tables, want a new empty schema (first was %q)", second, tables, first)
	}
	var left bool
	if err := conn.QueryRow(ctx, `SELECT EXISTS (SELECT 1 FROM pg_namespace WHERE nspname = $1)`, first).Scan(&left); err != nil {
		t.Fatal(err)
	}
	if left {
		t.Errorf("schema %s still exists after its test ended", first)
	}
}

func TestWithSearchPath(t *testing.T) {
	for _, c := range []struct{ base, want string }{
		{"postgres://u@h:5432/db?sslmode=disable", "postgres://u@h:5432/db?search_path=s1&sslmode=disable"},
		{"postgresql://u@h/db", "postgresql://u@h/db?search_path=s1"},
		{"host=h user=u dbname=db", "host=h user=u dbname=db search_path=s1"},
	} {
		if got := withSearchPath(t, c.base, "s1"); got != c.want {
			t.Errorf("withSearchPath(%q) = %q, want %q", c.base, got, c.want)
		}
	}
}
