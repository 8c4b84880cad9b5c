//go:build !linux

package main

import "errors"

// mountFS is not available here; the tests that need it skip.
func mountFS(dir, opts string) error { return errors.New("tmpfs mounts need Linux") }

// unmountFS undoes mountFS.
func unmountFS(dir string) error { return nil }
