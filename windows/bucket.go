package windows

import (
	"fmt"
	"math"
	"math/bits"
	"strconv"
	"strings"
	"time"
)

// BucketStart returns floor(t / bucket) * bucket in UTC, counting from the
// Unix epoch. Times before the epoch floor towards the past. bucket must be
// positive and t within the years 1678–2262 that UnixNano represents.
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

// ParseDuration parses Go duration syntax extended with a leading day count
// of 24-hour days: "7d", "1.5d", "1d12h", "-2d", "90m". The day count is a
// plain decimal number; Go syntax may follow it, without a sign of its own.
// Strings without "d" are parsed by time.ParseDuration alone.
func ParseDuration(s string) (time.Duration, error) {
	t := strings.TrimSpace(s)
	days, rest, hasDays := strings.Cut(t, "d")
	if !hasDays {
		d, err := time.ParseDuration(t)
		if err != nil {
			return 0, fmt.Errorf("invalid duration %q", s)
		}
		return d, nil
	}
	neg := false
	switch {
	case strings.HasPrefix(days, "-"):
		neg, days = true, days[1:]
	case strings.HasPrefix(days, "+"):
		days = days[1:]
	}
	d, ok := parseDays(days)
	if !ok {
		return 0, fmt.Errorf("invalid duration %q", s)
	}
	if rest != "" {
		r, err := time.ParseDuration(rest)
		if err != nil || rest[0] == '-' || rest[0] == '+' || r > math.MaxInt64-d {
			return 0, fmt.Errorf("invalid duration %q", s)
		}
		d += r
	}
	if neg {
		d = -d
	}
	return d, nil
}

// parseDays converts a decimal day count ("7", "1.5", ".25", "3.") to a
// duration, truncated to the nanosecond as time.ParseDuration truncates. It
// reports false on any other syntax and on overflow.
func parseDays(s string) (time.Duration, bool) {
	const day = uint64(24 * time.Hour)
	whole, frac, _ := strings.Cut(s, ".")
	if (whole == "" && frac == "") || !isDecimalDigits(whole) || !isDecimalDigits(frac) {
		return 0, false
	}
	var ns uint64
	if whole != "" {
		w, err := strconv.ParseUint(whole, 10, 64)
		if err != nil || w > math.MaxInt64/day {
			return 0, false
		}
		ns = w * day
	}
	// Digits past the 18th (worth under 1e-4 ns) are ignored, so 10^k fits
	// a uint64; frac·day/10^k is then exact in 128 bits.
	frac = frac[:min(len(frac), 18)]
	if frac != "" {
		f, _ := strconv.ParseUint(frac, 10, 64)
		scale := uint64(1)
		for range frac {
			scale *= 10
		}
		hi, lo := bits.Mul64(f, day)
		q, _ := bits.Div64(hi, lo, scale)
		ns += q
	}
	if ns > math.MaxInt64 {
		return 0, false
	}
	return time.Duration(ns), true
}

// isDecimalDigits reports whether s holds only the digits 0–9.
func isDecimalDigits(s string) bool {
	for i := 0; i < len(s); i++ {
		if s[i] < '0' || s[i] > '9' {
			return false
		}
	}
	return true
}

// FormatDuration prints d in the short form people write and
// ParseDuration reads back: whole days first ("7d", "1d12h"), then Go's
// units without trailing zero units ("1h", "1h30m", "5m", "90s"); a
// duration under a second or negative keeps Go's form.
func FormatDuration(d time.Duration) string {
	if d <= 0 || d%time.Second != 0 {
		return d.String()
	}
	const day = 24 * time.Hour
	var b strings.Builder
	if days := d / day; days > 0 {
		b.WriteString(strconv.FormatInt(int64(days), 10))
		b.WriteByte('d')
		d -= days * day
	}
	for _, u := range []struct {
		unit time.Duration
		name byte
	}{{time.Hour, 'h'}, {time.Minute, 'm'}, {time.Second, 's'}} {
		if n := d / u.unit; n > 0 {
			b.WriteString(strconv.FormatInt(int64(n), 10))
			b.WriteByte(u.name)
			d -= n * u.unit
		}
	}
	return b.String()
}
