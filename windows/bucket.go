package windows

import (
	"fmt"
	"strconv"
	"strings"
	"time"
)

// BucketStart returns floor(t / bucket) * bucket in UTC, counting from the
// Unix epoch. Times before the epoch floor towards the past.
func BucketStart(t time.Time, bucket time.Duration) time.Time {
	ns := t.UnixNano()
	b := int64(bucket)
	q := ns / b
	if ns%b != 0 && ns < 0 {
		q--
	}
	return time.Unix(0, q*b).UTC()
}

// Watermark returns the end of the bucket holding latest, the latest
// prediction time seen. A zero latest gives a zero watermark.
func Watermark(latest time.Time, bucket time.Duration) time.Time {
	if latest.IsZero() {
		return time.Time{}
	}
	return BucketStart(latest, bucket).Add(bucket)
}

// Window is a configured rolling window: the buckets whose start lies in
// [W − Lag − Length, W − Lag) for watermark W.
type Window struct {
	Name   string
	Length time.Duration
	Lag    time.Duration
}

// Bounds returns the window's [from, to) for watermark w.
func (win Window) Bounds(w time.Time) (from, to time.Time) {
	to = w.Add(-win.Lag)
	return to.Add(-win.Length), to
}

// Span returns Length + Lag: how far back from the watermark the window reaches.
func (win Window) Span() time.Duration { return win.Length + win.Lag }

// Validate checks that the window is named, that Length is a positive and
// Lag a non-negative multiple of bucket.
func (win Window) Validate(bucket time.Duration) error {
	switch {
	case win.Name == "":
		return fmt.Errorf("window needs a name")
	case bucket <= 0:
		return fmt.Errorf("window %s: bucket must be positive", win.Name)
	case win.Length <= 0:
		return fmt.Errorf("window %s: length must be positive", win.Name)
	case win.Length%bucket != 0:
		return fmt.Errorf("window %s: length %s is not a multiple of the bucket %s", win.Name, FormatDuration(win.Length), FormatDuration(bucket))
	case win.Lag < 0:
		return fmt.Errorf("window %s: lag must not be negative", win.Name)
	case win.Lag%bucket != 0:
		return fmt.Errorf("window %s: lag %s is not a multiple of the bucket %s", win.Name, FormatDuration(win.Lag), FormatDuration(bucket))
	}
	return nil
}

// ParseDuration parses Go duration syntax extended with a "d" unit of 24
// hours, which may start the string and combine with the others ("7d",
// "1d12h", "90m").
func ParseDuration(s string) (time.Duration, error) {
	t := strings.TrimSpace(s)
	neg := false
	if rest, ok := strings.CutPrefix(t, "-"); ok {
		neg, t = true, rest
	}
	var days time.Duration
	if i := strings.IndexByte(t, 'd'); i >= 0 {
		n, err := strconv.ParseFloat(t[:i], 64)
		if err != nil || n < 0 {
			return 0, fmt.Errorf("invalid duration %q", s)
		}
		days = time.Duration(n * float64(24*time.Hour))
		t = t[i+1:]
	}
	var rest time.Duration
	if t != "" {
		var err error
		rest, err = time.ParseDuration(t)
		if err != nil || rest < 0 {
			return 0, fmt.Errorf("invalid duration %q", s)
		}
	} else if days == 0 && !strings.Contains(s, "d") {
		return 0, fmt.Errorf("invalid duration %q", s)
	}
	d := days + rest
	if neg {
		d = -d
	}
	return d, nil
}

// FormatDuration prints d in the shortest form ParseDuration reads back,
// using whole days where it can ("7d", "1d12h0m0s", "5m0s").
func FormatDuration(d time.Duration) string {
	if d > 0 && d%(24*time.Hour) == 0 {
		return strconv.FormatInt(int64(d/(24*time.Hour)), 10) + "d"
	}
	return d.String()
}
