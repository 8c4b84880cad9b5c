// Package migrations holds classwatch's versioned schema for each backend,
// embedded into the binary. Files are named NNN_name.up.sql (zero-padded, so
// lexical order is version order) under postgres/ and sqlite/. The backends
// apply them in order, each inside its own transaction, and record the
// version in a schema-version table.
package migrations

import (
	"embed"
	"fmt"
	"io/fs"
	"path"
	"sort"
	"strconv"
	"strings"
)

//go:embed postgres/*.sql sqlite/*.sql
var files embed.FS

// Migration is one schema step.
type Migration struct {
	Version int
	Name    string
	SQL     string
}

// Dialect names a backend's migration folder.
type Dialect string

// The two backends.
const (
	Postgres Dialect = "postgres"
	SQLite   Dialect = "sqlite"
)

// List returns the dialect's migrations in version order. It fails on a
// malformed file name or a repeated version.
func List(d Dialect) ([]Migration, error) {
	entries, err := fs.ReadDir(files, string(d))
	if err != nil {
		return nil, fmt.Errorf("read %s migrations: %w", d, err)
	}
	var out []Migration
	seen := map[int]string{}
	for _, e := range entries {
		name := e.Name()
		base, ok := strings.CutSuffix(name, ".up.sql")
		if !ok {
			continue
		}
		num, rest, ok := strings.Cut(base, "_")
		if !ok {
			return nil, fmt.Errorf("migration %s/%s: name must be NNN_name.up.sql", d, name)
		}
		v, err := strconv.Atoi(num)
		if err != nil || v <= 0 {
			return nil, fmt.Errorf("migration %s/%s: bad version %q", d, name, num)
		}
		if prev, dup := seen[v]; dup {
			return nil, fmt.Errorf("migration %s/%s: version %d also used by %s", d, name, v, prev)
		}
		seen[v] = name
		body, err := fs.ReadFile(files, path.Join(string(d), name))
		if err != nil {
			return nil, fmt.Errorf("read migration %s/%s: %w", d, name, err)
		}
		out = append(out, Migration{Version: v, Name: rest, SQL: string(body)})
	}
	sort.Slice(out, func(i, j int) bool { return out[i].Version < out[j].Version })
	return out, nil
}

// Latest returns the highest version the binary knows for d.
func Latest(d Dialect) (int, error) {
	ms, err := List(d)
	if err != nil {
		return 0, err
	}
	if len(ms) == 0 {
		return 0, nil
	}
	return ms[len(ms)-1].Version, nil
}
