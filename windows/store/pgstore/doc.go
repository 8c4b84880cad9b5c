// Package pgstore implements store.Store on PostgreSQL through pgx v5.
package pgstore
