package api

import (
	"context"
	"sync"
	"time"

	"github.com/classwatch/classwatch/windows/store"
)

// latestLabelsTTL is how long the pages reuse the latest label times: the
// store finds them by scanning the label history, which grows with the
// retention, and "last label 12m ago" needs no finer freshness.
const latestLabelsTTL = 30 * time.Second

// labelTimes caches store.Store.LatestLabels for latestLabelsTTL.
type labelTimes struct {
	mu     sync.Mutex
	readAt time.Time
	times  map[string]time.Time
}

// get returns the cached times, reading them again when older than the
// TTL; on a failed read it keeps the old ones and returns the error.
func (c *labelTimes) get(ctx context.Context, st store.Store, now time.Time) (map[string]time.Time, error) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.times != nil && now.Sub(c.readAt) < latestLabelsTTL && !now.Before(c.readAt) {
		return c.times, nil
	}
	times, err := st.LatestLabels(ctx)
	if err != nil {
		return c.times, err
	}
	c.times, c.readAt = times, now
	return times, nil
}
