// Package lease keeps one replica in charge of a job that must not run
// twice at once (the alert evaluator, the join's maintenance jobs) on top
// of the store's named single-holder locks (store.Store's TryLead).
//
// # States
//
// A Leader is a follower or a leader of its one named lock:
//
//	follower ──Lead: TryLead succeeds, Acquired succeeds──► leader
//	    ▲  │                                                  │
//	    │  └── TryLead finds it held, fails, or Acquired fails │
//	    │      (stays follower)                                │
//	    └──── Lead: Alive fails (lock lost) ── Lost ◄──────────┘
//	    └──── Release ◄────────────────────────────────────────┘
//
// Lead is called at each point where the job would run: a leader first
// confirms its lock is alive, a follower tries to take it without
// waiting. Held reports the last known state without any I/O, so it may
// be read under the caller's own locks.
//
// # Failure Handling
//
//   - The holder's process dies: its store session ends and the store
//     frees the lock (PostgreSQL frees an advisory lock with its session);
//     another replica takes it at its next Lead.
//   - The holder loses its connection: Alive fails at the next Lead; the
//     Leader releases what is left of the lock, becomes a follower, calls
//     Lost with the error, and in the same call tries to take the lock
//     again (usually failing until the connection returns).
//   - TryLead fails (store down): Lead returns the error and reports not
//     held; the caller logs it and tries again at its next run.
//   - Acquired fails (the new leader cannot load its state): the lock is
//     given back at once so that another replica may take it, and Lead
//     returns the error.
//   - Shutdown: Release gives the lock up; another replica can take it
//     at once rather than after the session times out.
//
// Between two calls of Lead a leader may have lost its lock without
// knowing it; the jobs guarded this way are written so that a second
// runner at worst repeats work (the alert evaluator may notify a change
// twice; maintenance jobs are idempotent), never corrupts it.
package lease
