package pgstore

import (
	"container/heap"
	"context"
	"fmt"
	"time"

	"github.com/jackc/pgx/v5"

	"github.com/classwatch/classwatch/windows/store"
)

// eventStream yields chunks of events in time order, produced on a
// goroutine of its own.
type eventStream struct {
	ch   chan []store.Event
	errc chan error
	buf  []store.Event
	done bool
}

// produce starts run on its own goroutine, which may run ahead of the
// reader by up to ahead chunks; run hands each chunk to send, which fails
// once ctx ends.
func produce(ctx context.Context, ahead int, run func(send func([]store.Event) error) error) *eventStream {
	es := &eventStream{ch: make(chan []store.Event, ahead), errc: make(chan error, 1)}
	go func() {
		defer close(es.ch)
		es.errc <- run(func(chunk []store.Event) error {
			select {
			case es.ch <- chunk:
				return nil
			case <-ctx.Done():
				return ctx.Err()
			}
		})
	}()
	return es
}

// streamPredictions reads prediction events with one query.
func streamPredictions(ctx context.Context, tx pgx.Tx, sql string, args []any) *eventStream {
	return produce(ctx, 2, func(send func([]store.Event) error) error {
		rows, err := tx.Query(ctx, sql, args...)
		if err != nil {
			return unavailable("read events", err)
		}
		defer rows.Close()
		chunk := make([]store.Event, 0, eventChunk)
		var scores []byte
		for rows.Next() {
			chunk = append(chunk, store.Event{})
			if err := scanPrediction(rows, &chunk[len(chunk)-1], &scores); err != nil {
				return err
			}
			if len(chunk) == eventChunk {
				if err := send(chunk); err != nil {
					return err
				}
				chunk = make([]store.Event, 0, eventChunk)
			}
		}
		if err := rows.Err(); err != nil {
			return unavailable("read events", err)
		}
		if len(chunk) > 0 {
			return send(chunk)
		}
		return nil
	})
}

// streamLabels merges the label events of ld's days in time order. It
// runs up to labelsAhead chunks ahead of the reader, so that the server
// sorts the next day while the reader takes in the one before.
func streamLabels(ctx context.Context, ld *labelDays) *eventStream {
	return produce(ctx, labelsAhead, func(send func([]store.Event) error) error {
		chunk := make([]store.Event, 0, eventChunk)
		for {
			// Days not yet open hold nothing before their start.
			var err error
			if l := ld.head(); l != nil {
				err = ld.openThrough(ctx, l.At)
			} else if ld.more() {
				err = ld.openNext(ctx)
			}
			if err != nil {
				return err
			}
			l := ld.head()
			switch {
			case l != nil:
				chunk = append(chunk, *l)
				if err := ld.pop(ctx); err != nil {
					return err
				}
			case ld.more():
				continue
			case len(chunk) > 0:
				return send(chunk)
			default:
				return nil
			}
			if len(chunk) == eventChunk {
				if err := send(chunk); err != nil {
					return err
				}
				chunk = make([]store.Event, 0, eventChunk)
			}
		}
	})
}

// peek returns the stream's next event, nil at its end.
func (es *eventStream) peek() (*store.Event, error) {
	for len(es.buf) == 0 {
		if es.done {
			return nil, nil
		}
		chunk, ok := <-es.ch
		if !ok {
			es.done = true
			return nil, <-es.errc
		}
		es.buf = chunk
	}
	return &es.buf[0], nil
}

// stop waits for the stream's goroutine to end, dropping what it held.
func (es *eventStream) stop() {
	for range es.ch {
	}
	if !es.done {
		es.done = true
		<-es.errc
	}
}

// labelsAhead is how many chunks a label stream may read ahead: a fixed
// bound of memory, about as many events as a day of 100,000 predictions
// changes.
const labelsAhead = 48

// labelDays reads the label changes of some days' predictions through a
// cursor per day, all in one transaction, and keeps the open days in a
// heap by their next event. Its memory is a chunk per open day.
type labelDays struct {
	tx       pgx.Tx
	args     func(lo, hi time.Time) []any
	from, to time.Time
	days     []time.Time // the days with raw rows, ascending
	next     int         // the first day not yet opened
	open     dayHeap
	cursors  int
}

// dayCursor is one open day: its cursor and the events fetched and not
// yet taken.
type dayCursor struct {
	name  string
	buf   []store.Event
	chunk []store.Event // buf's backing array
	done  bool          // the cursor has nothing more to fetch
}

// head returns the earliest label event of the open days, nil if none.
func (ld *labelDays) head() *store.Event {
	if len(ld.open) == 0 {
		return nil
	}
	return &ld.open[0].buf[0]
}

// more reports whether some day is not yet open.
func (ld *labelDays) more() bool { return ld.next < len(ld.days) }

// openThrough opens every day that starts at or before t.
func (ld *labelDays) openThrough(ctx context.Context, t time.Time) error {
	for ld.more() && !ld.days[ld.next].After(t) {
		if err := ld.openNext(ctx); err != nil {
			return err
		}
	}
	return nil
}

// openNext opens the next day and reads its first chunk; a day without
// label changes closes at once.
func (ld *labelDays) openNext(ctx context.Context) error {
	if !ld.more() {
		return nil
	}
	day := ld.days[ld.next]
	ld.next++
	ld.cursors++
	c := &dayCursor{name: fmt.Sprintf("classwatch_events_%d", ld.cursors)}
	lo, hi := day, day.Add(24*time.Hour)
	if ld.from.After(lo) {
		lo = ld.from
	}
	if ld.to.Before(hi) {
		hi = ld.to
	}
	if _, err := ld.tx.Exec(ctx, "DECLARE "+c.name+" NO SCROLL CURSOR FOR "+sqlEventLabelsDay, ld.args(lo, hi)...); err != nil {
		return unavailable("open day of label events", err)
	}
	if err := ld.fetch(ctx, c); err != nil {
		return err
	}
	if len(c.buf) > 0 {
		heap.Push(&ld.open, c)
	}
	return nil
}

// fetch reads c's next chunk, closing the cursor once it is exhausted.
func (ld *labelDays) fetch(ctx context.Context, c *dayCursor) error {
	rows, err := ld.tx.Query(ctx, fmt.Sprintf("FETCH %d FROM %s", eventChunk, c.name))
	if err != nil {
		return unavailable("read label events", err)
	}
	if c.chunk == nil {
		c.chunk = make([]store.Event, 0, eventChunk)
	}
	c.buf = c.chunk[:0]
	var scores []byte
	for rows.Next() {
		c.buf = append(c.buf, store.Event{})
		if err := scanLabel(rows, &c.buf[len(c.buf)-1], &scores); err != nil {
			rows.Close()
			return err
		}
	}
	if err := rows.Err(); err != nil {
		return unavailable("read label events", err)
	}
	if len(c.buf) < eventChunk {
		c.done = true
		if _, err := ld.tx.Exec(ctx, "CLOSE "+c.name); err != nil {
			return unavailable("close day of label events", err)
		}
	}
	return nil
}

// pop drops the head event, reading the next chunk of its day when the
// day's buffer runs out.
func (ld *labelDays) pop(ctx context.Context) error {
	c := ld.open[0]
	c.buf = c.buf[1:]
	if len(c.buf) == 0 && !c.done {
		if err := ld.fetch(ctx, c); err != nil {
			return err
		}
	}
	if len(c.buf) == 0 {
		heap.Pop(&ld.open)
		return nil
	}
	heap.Fix(&ld.open, 0)
	return nil
}

// dayHeap orders open days by their next event's time.
type dayHeap []*dayCursor

func (h dayHeap) Len() int           { return len(h) }
func (h dayHeap) Less(i, j int) bool { return h[i].buf[0].At.Before(h[j].buf[0].At) }
func (h dayHeap) Swap(i, j int)      { h[i], h[j] = h[j], h[i] }
func (h *dayHeap) Push(x any)        { *h = append(*h, x.(*dayCursor)) }
func (h *dayHeap) Pop() any {
	old := *h
	c := old[len(old)-1]
	*h = old[:len(old)-1]
	return c
}
