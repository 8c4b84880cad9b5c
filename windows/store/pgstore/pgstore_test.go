package pgstore

import (
	"testing"

	"github.com/classwatch/classwatch/windows/store"
	"github.com/classwatch/classwatch/windows/store/pgtest"
	"github.com/classwatch/classwatch/windows/store/storetest"
)

func TestMain(m *testing.M) { pgtest.Main(m) }

// newStore returns a migrated store in a schema of its own.
func newStore(t *testing.T) *Store {
	t.Helper()
	s, err := Open(t.Context(), pgtest.URL(t), Options{})
	if err != nil {
		t.Fatalf("Open: %v", err)
	}
	t.Cleanup(func() {
		if err := s.Close(); err != nil {
			t.Errorf("Close: %v", err)
		}
	})
	if err := s.Migrate(t.Context()); err != nil {
		t.Fatalf("Migrate: %v", err)
	}
	return s
}

func TestConformance(t *testing.T) {
	storetest.Exercise(t, func(t *testing.T) store.Store { return newStore(t) })
}
