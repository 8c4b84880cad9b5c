package pgstore

import (
	"context"
	"fmt"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/migrations"
)

// Migrate applies the pending migrations of migrations.List(migrations.Postgres)
// in version order, each in its own transaction together with its row in
// schema_version. It refuses a database whose recorded version is newer than
// the newest migration this binary carries. Daemons starting at once are
// safe: Migrate holds a session advisory lock (per schema) while it reads
// the version and applies migrations, so the second waits and then finds
// nothing to do. With Options.Schema set, it creates the schema first.
func (s *Store) Migrate(ctx context.Context) (err error) {
	ms, err := migrations.List(migrations.Postgres)
	if err != nil {
		return err
	}
	latest := 0
	if len(ms) > 0 {
		latest = ms[len(ms)-1].Version
	}
	conn, err := s.pool.Acquire(ctx)
	if err != nil {
		return unavailable("migrate postgres store", err)
	}
	defer conn.Release()
	if _, err := conn.Exec(ctx, sqlLockSession, s.keys.migrate); err != nil {
		return unavailable("take migration lock", err)
	}
	defer func() {
		// Unlocking on a broken connection fails, but then the session and
		// its lock are gone anyway.
		if _, uerr := conn.Exec(context.WithoutCancel(ctx), sqlUnlockSession, s.keys.migrate); uerr != nil && err == nil {
			err = unavailable("release migration lock", uerr)
		}
	}()

	if s.schema != "" {
		if _, err := conn.Exec(ctx, "CREATE SCHEMA IF NOT EXISTS "+pgx.Identifier{s.schema}.Sanitize()); err != nil {
			return unavailable("create schema", err)
		}
	}
	if _, err := conn.Exec(ctx, sqlCreateVersionTable); err != nil {
		return unavailable("create schema version table", err)
	}
	var current int
	if err := conn.QueryRow(ctx, sqlSchemaVersion).Scan(&current); err != nil {
		return unavailable("read schema version", err)
	}
	if current > latest {
		return fmt.Errorf("migrate postgres store: database schema version %d is newer than this binary's %d; run a newer classwatch", current, latest)
	}
	for _, m := range ms {
		if m.Version <= current {
			continue
		}
		err := pgx.BeginFunc(ctx, conn, func(tx pgx.Tx) error {
			if _, err := tx.Exec(ctx, m.SQL); err != nil {
				return fmt.Errorf("apply migration %03d_%s: %w", m.Version, m.Name, err)
			}
			_, err := tx.Exec(ctx, sqlRecordVersion, m.Version, m.Name)
			return err
		})
		if err != nil {
			return unavailable(fmt.Sprintf("migrate to version %d", m.Version), err)
		}
	}
	return nil
}
