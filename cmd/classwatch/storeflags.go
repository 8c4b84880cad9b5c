package main

import (
	"context"
	"errors"
	"flag"
	"fmt"

	"github.com/classwatch/classwatch/windows/store"
)

// storeFlags are the --config and --database flags of the commands that
// work on the store without serving (migrate, verify, audit, ingest).
type storeFlags struct {
	config   *string
	database *string
}

// addStoreFlags registers the flags on fs.
func addStoreFlags(fs *flag.FlagSet) storeFlags {
	return storeFlags{
		config:   fs.String("config", "", "config `file` (YAML): database, data_dir, models"),
		database: fs.String("database", "", "PostgreSQL `URL`, overriding the config and "+databaseURLEnv),
	}
}

// open loads the config and opens its store. With migrate it applies
// pending migrations; otherwise it checks that the store answers and is
// migrated, so a read-only command never changes the schema.
func (f storeFlags) open(ctx context.Context, migrate bool) (config, store.Store, error) {
	cfg, err := loadConfig(configSource{path: *f.config, database: *f.database})
	if err != nil {
		return cfg, nil, err
	}
	st, err := openStore(ctx, cfg)
	if err != nil {
		return cfg, nil, err
	}
	if migrate {
		err = st.Migrate(ctx)
	} else {
		err = st.Ping(ctx)
	}
	if err != nil {
		return cfg, nil, errors.Join(fmt.Errorf("prepare store: %w", err), st.Close())
	}
	return cfg, st, nil
}
