package sqlitestore

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/migrations"
)

// Migrate applies the pending migrations of migrations.List(migrations.SQLite)
// in version order, each in its own transaction together with its row in
// schema_version. It refuses a database whose recorded version is newer
// than the newest migration this binary carries.
func (s *Store) Migrate(ctx context.Context) error {
	ms, err := migrations.List(migrations.SQLite)
	if err != nil {
		return err
	}
	latest := 0
	if len(ms) > 0 {
		latest = ms[len(ms)-1].Version
	}
	if _, err := s.write.ExecContext(ctx, sqlCreateVersionTable); err != nil {
		return unavailable("create schema version table", err)
	}
	var current int
	if err := s.write.QueryRowContext(ctx, sqlSchemaVersion).Scan(&current); err != nil {
		return unavailable("read schema version", err)
	}
	if current > latest {
		return fmt.Errorf("migrate sqlite store: database schema version %d is newer than this binary's %d; run a newer classwatch", current, latest)
	}
	for _, m := range ms {
		if m.Version <= current {
			continue
		}
		if err := s.applyMigration(ctx, m); err != nil {
			return err
		}
	}
	return nil
}

// applyMigration runs one migration unless another process applied it
// since Migrate read the version; the check sits inside the transaction,
// whose BEGIN IMMEDIATE excludes other writers.
func (s *Store) applyMigration(ctx context.Context, m migrations.Migration) error {
	tx, err := s.write.BeginTx(ctx, nil)
	if err != nil {
		return unavailable("begin migration", err)
	}
	defer tx.Rollback()
	var current int
	if err := tx.QueryRowContext(ctx, sqlSchemaVersion).Scan(&current); err != nil {
		return unavailable("read schema version", err)
	}
	if current >= m.Version {
		return nil
	}
	if _, err := tx.ExecContext(ctx, m.SQL); err != nil {
		return fmt.Errorf("apply migration %03d_%s: %w", m.Version, m.Name, err)
	}
	if _, err := tx.ExecContext(ctx, sqlRecordVersion, m.Version, m.Name, time.Now().UnixMicro()); err != nil {
		return unavailable("record schema version", err)
	}
	if err := tx.Commit(); err != nil {
		return unavailable("commit migration", err)
	}
	return nil
}

// Ping checks that the database answers and carries the newest schema.
func (s *Store) Ping(ctx context.Context) error {
	latest, err := migrations.Latest(migrations.SQLite)
	if err != nil {
		return err
	}
	var migrated bool
	if err := s.read.QueryRowContext(ctx, sqlHasVersionTable).Scan(&migrated); err != nil {
		return unavailable("ping sqlite store", err)
	}
	if !migrated {
		return errors.New("ping sqlite store: database is not migrated")
	}
	var current int
	if err := s.read.QueryRowContext(ctx, sqlSchemaVersion).Scan(&current); err != nil {
		return unavailable("ping sqlite store", err)
	}
	if current != latest {
		return fmt.Errorf("ping sqlite store: schema version %d, this binary needs %d", current, latest)
	}
	return nil
}
