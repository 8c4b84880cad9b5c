package main

import "syscall"

// mountFS mounts a tmpfs with opts (such as "size=8m,ro") at dir.
func mountFS(dir, opts string) error {
	return syscall.Mount("tmpfs", dir, "tmpfs", 0, opts)
}

// unmountFS undoes mountFS.
func unmountFS(dir string) error { return syscall.Unmount(dir, 0) }
