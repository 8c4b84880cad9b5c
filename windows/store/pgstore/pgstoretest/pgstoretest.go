// Package pgstoretest opens PostgreSQL stores for tests of the packages
// that run on pgstore (alerts, collector, windows, lease, the daemon). It lives apart
// from pgtest, which pgstore's own tests import and so may not import
// pgstore.
package pgstoretest

import (
	"context"
	"testing"

	"github.com/classwatch/classwatch/windows/store/pgstore"
)

// Open opens a migrated store on url (from pgtest.URL) and closes it when
// the test ends. Several stores opened on one url share one schema, as
// replicas of one database do.
func Open(tb testing.TB, url string) *pgstore.Store {
	tb.Helper()
	ctx := context.Background()
	st, err := pgstore.Open(ctx, url, pgstore.Options{})
	if err != nil {
		tb.Fatalf("open postgres store: %v", err)
	}
	tb.Cleanup(func() { st.Close() })
	if err := st.Migrate(ctx); err != nil {
		tb.Fatalf("migrate: %v", err)
	}
	return st
}
