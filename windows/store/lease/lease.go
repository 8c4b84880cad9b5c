package lease

import (
	"context"
	"errors"
	"fmt"
	"sync"
	"sync/atomic"

	"github.com/classwatch/classwatch/windows/store"
)

// Taker takes named single-holder locks; store.Store satisfies it.
type Taker interface {
	// TryLead takes the lock without waiting; nil, nil when another holder
	// has it.
	TryLead(ctx context.Context, name string) (store.Lease, error)
}

// Options are the Leader's hooks; both are optional.
type Options struct {
	// Acquired runs once the lock is taken, before Lead reports it held
	// (Held is already true while it runs); an error gives the lock back.
	Acquired func(ctx context.Context) error
	// Lost runs when a held lock is found dead, after Held turned false,
	// with the error Alive returned.
	Lost func(err error)
}

// Leader holds, or tries to take, one named lock. It is safe for
// concurrent use; Lead, Release and the hooks are serialised.
type Leader struct {
	taker Taker
	name  string
	opts  Options

	mu    sync.Mutex // held during Lead and Release, hooks included
	lease store.Lease
	held  atomic.Bool
}

// New returns a follower of the lock called name.
func New(t Taker, name string, opts Options) *Leader {
	return &Leader{taker: t, name: name, opts: opts}
}

// Name is the lock's name.
func (l *Leader) Name() string { return l.name }

// Held reports whether this replica held the lock at the last Lead; it
// does no I/O.
func (l *Leader) Held() bool { return l.held.Load() }

// Lead reports whether this replica holds the lock now: a held lock is
// checked with Alive, a free one is taken. It returns an error when the
// store could not be asked or Acquired failed; the lock is then not held.
func (l *Leader) Lead(ctx context.Context) (bool, error) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.lease != nil {
		err := l.lease.Alive(ctx)
		if err == nil {
			return true, nil
		}
		// What is left of a dead lock is released on a fresh context: the
		// caller's may be the reason it died.
		_ = l.lease.Release(context.WithoutCancel(ctx))
		l.lease = nil
		l.held.Store(false)
		if l.opts.Lost != nil {
			l.opts.Lost(err)
		}
	}
	ls, err := l.taker.TryLead(ctx, l.name)
	if err != nil {
		return false, fmt.Errorf("take lock %q: %w", l.name, err)
	}
	if ls == nil {
		return false, nil
	}
	l.lease = ls
	l.held.Store(true)
	if l.opts.Acquired != nil {
		if err := l.opts.Acquired(ctx); err != nil {
			rerr := ls.Release(context.WithoutCancel(ctx))
			l.lease = nil
			l.held.Store(false)
			return false, errors.Join(fmt.Errorf("take lock %q: %w", l.name, err), rerr)
		}
	}
	return true, nil
}

// Release gives the lock up if held; calling it again is harmless.
func (l *Leader) Release(ctx context.Context) error {
	l.mu.Lock()
	defer l.mu.Unlock()
	if l.lease == nil {
		return nil
	}
	err := l.lease.Release(ctx)
	l.lease = nil
	l.held.Store(false)
	if err != nil {
		return fmt.Errorf("release lock %q: %w", l.name, err)
	}
	return nil
}
