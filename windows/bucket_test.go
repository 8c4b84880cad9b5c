package windows

import (
	"strings"
	"testing"
	"time"
	_ "time/tzdata" // zone rules for the DST cases, independent of the host
)

func mustLoad(t *testing.T, name string) *time.Location {
	t.Helper()
	loc, err := time.LoadLocation(name)
	if err != nil {
		t.Fatal(err)
	}
	return loc
}

func TestBucketStart(t *testing.T) {
	sydney := mustLoad(t, "Australia/Sydney")
	newYork := mustLoad(t, "America/New_York")
	kolkata := time.FixedZone("UTC+05:30", 5*3600+1800)
	utc := func(s string) time.Time {
		v, err := time.Parse(time.RFC3339Nano, s)
		if err != nil {
			t.Fatal(err)
		}
		return v
	}
	for _, c := range []struct {
		name   string
		at     time.Time
		bucket time.Duration
		want   time.Time
	}{
		{"on a boundary", utc("2026-03-01T12:05:00Z"), 5 * time.Minute, utc("2026-03-01T12:05:00Z")},
		{"inside", utc("2026-03-01T12:09:59.999999999Z"), 5 * time.Minute, utc("2026-03-01T12:05:00Z")},
		{"epoch", utc("1970-01-01T00:00:00Z"), time.Hour, utc("1970-01-01T00:00:00Z")},
		{"one ns before the epoch", utc("1969-12-31T23:59:59.999999999Z"), 5 * time.Minute, utc("1969-12-31T23:55:00Z")},
		{"before the epoch, on a boundary", utc("1969-12-31T23:55:00Z"), 5 * time.Minute, utc("1969-12-31T23:55:00Z")},
		{"long before the epoch", utc("1900-06-15T10:17:00Z"), 24 * time.Hour, utc("1900-06-15T00:00:00Z")},
		// A half-hour zone: hour buckets are UTC hours, so they start at :30 local.
		{"UTC+05:30", time.Date(2026, 3, 1, 9, 10, 0, 0, kolkata), time.Hour, utc("2026-03-01T03:00:00Z")},
		// Sydney leaves daylight time at 03:00 local on 5 April 2026 (IANA tz
		// database, as embedded by Go's time/tzdata); the
		// repeated local hour 02:00–03:00 maps to two different UTC buckets.
		{"Sydney first 02:30", utc("2026-04-04T15:30:00Z").In(sydney), time.Hour, utc("2026-04-04T15:00:00Z")},
		{"Sydney second 02:30", utc("2026-04-04T16:30:00Z").In(sydney), time.Hour, utc("2026-04-04T16:00:00Z")},
		// New York skips 02:00–03:00 local on 8 March 2026 (same source): a day bucket is
		// still 24 real hours, aligned to UTC midnight.
		{"New York spring forward", time.Date(2026, 3, 8, 3, 30, 0, 0, newYork), 24 * time.Hour, utc("2026-03-08T00:00:00Z")},
	} {
		if strings.HasPrefix(c.name, "Sydney") && c.at.Format("15:04") != "02:30" {
			t.Fatalf("%s: local time %s, want 02:30", c.name, c.at)
		}
		got := BucketStart(c.at, c.bucket)
		if !got.Equal(c.want) || got.Location() != time.UTC {
			t.Errorf("%s: BucketStart(%s, %s) = %s, want %s (UTC)", c.name, c.at, c.bucket, got, c.want)
		}
	}
}

// checkBucketStart checks the defining properties of BucketStart for one
// instant: aligned, at or before t, less than a bucket before it, UTC, and
// the same for the instant seen in any zone.
func checkBucketStart(t *testing.T, at time.Time, bucket time.Duration) {
	t.Helper()
	got := BucketStart(at, bucket)
	if got.Location() != time.UTC {
		t.Errorf("BucketStart(%s, %s) in %s, want UTC", at, bucket, got.Location())
	}
	if got.UnixNano()%int64(bucket) != 0 {
		t.Errorf("BucketStart(%s, %s) = %s is not aligned", at, bucket, got)
	}
	if got.After(at) || !at.Before(got.Add(bucket)) {
		t.Errorf("BucketStart(%s, %s) = %s: bucket does not hold t", at, bucket, got)
	}
	if again := BucketStart(got, bucket); !again.Equal(got) {
		t.Errorf("BucketStart of a bucket start %s = %s", got, again)
	}
	if z := BucketStart(at.In(time.FixedZone("west", -9*3600-1800)), bucket); !z.Equal(got) {
		t.Errorf("BucketStart depends on the zone: %s vs %s", z, got)
	}
}

func TestBucketStartProperties(t *testing.T) {
	buckets := []time.Duration{time.Nanosecond, 7 * time.Nanosecond, time.Second, 5 * time.Minute, time.Hour, 24 * time.Hour, 7 * 24 * time.Hour}
	base := []time.Time{
		time.Unix(0, 0), time.Unix(0, -1), time.Unix(-1, 0), time.Unix(1772366400, 0),
		time.Date(1969, 7, 20, 20, 17, 40, 0, time.UTC), time.Date(1700, 1, 1, 0, 0, 0, 1, time.UTC),
		time.Date(2262, 1, 1, 0, 0, 0, 0, time.UTC),
	}
	for _, b := range buckets {
		for _, at := range base {
			for _, shift := range []time.Duration{0, 1, -1, b - 1, b, -b, b + 1} {
				checkBucketStart(t, at.Add(shift), b)
			}
		}
	}
}

func TestWatermark(t *testing.T) {
	if w := Watermark(time.Time{}, 5*time.Minute); !w.IsZero() {
		t.Errorf("Watermark(zero) = %s, want zero", w)
	}
	for _, c := range []struct {
		latest, want string
	}{
		// The end of the bucket holding the latest prediction (the watermark's definition).
		{"2026-03-01T12:07:00Z", "2026-03-01T12:10:00Z"},
		// A prediction exactly on a boundary opens the next bucket.
		{"2026-03-01T12:10:00Z", "2026-03-01T12:15:00Z"},
		{"1969-12-31T23:58:00+01:00", "1969-12-31T23:00:00Z"},
		{"1969-12-31T23:59:59Z", "1970-01-01T00:00:00Z"},
	} {
		latest, _ := time.Parse(time.RFC3339, c.latest)
		want, _ := time.Parse(time.RFC3339, c.want)
		got := Watermark(latest, 5*time.Minute)
		if !got.Equal(want) {
			t.Errorf("Watermark(%s) = %s, want %s", c.latest, got, c.want)
		}
		if !got.After(latest) || got.Sub(latest) > 5*time.Minute {
			t.Errorf("Watermark(%s) = %s is not within one bucket after it", c.latest, got)
		}
	}
}

func TestWindowBounds(t *testing.T) {
	w := time.Date(2026, 3, 10, 0, 0, 0, 0, time.UTC)
	for _, c := range []struct {
		win      Window
		from, to time.Time
	}{
		{Window{Name: "1h", Length: time.Hour}, w.Add(-time.Hour), w},
		{Window{Name: "7d-matured", Length: 168 * time.Hour, Lag: 72 * time.Hour}, w.Add(-240 * time.Hour), w.Add(-72 * time.Hour)},
	} {
		from, to := c.win.Bounds(w)
		if !from.Equal(c.from) || !to.Equal(c.to) {
			t.Errorf("%s.Bounds(%s) = [%s, %s), want [%s, %s)", c.win.Name, w, from, to, c.from, c.to)
		}
		if to.Sub(from) != c.win.Length || w.Sub(from) != c.win.Span() {
			t.Errorf("%s: length %s, span %s", c.win.Name, to.Sub(from), w.Sub(from))
		}
		// A bucket-aligned watermark and a valid window give aligned bounds.
		if err := c.win.Validate(5 * time.Minute); err != nil {
			t.Fatal(err)
		}
		if !BucketStart(from, 5*time.Minute).Equal(from) || !BucketStart(to, 5*time.Minute).Equal(to) {
			t.Errorf("%s: bounds [%s, %s) not bucket aligned", c.win.Name, from, to)
		}
	}
}

func TestWindowValidate(t *testing.T) {
	const b = 5 * time.Minute
	for _, c := range []struct {
		win     Window
		bucket  time.Duration
		wantErr string
	}{
		{Window{Name: "ok", Length: time.Hour, Lag: 10 * time.Minute}, b, ""},
		{Window{Length: time.Hour}, b, "needs a name"},
		{Window{Name: "w", Length: time.Hour}, 0, "bucket must be positive"},
		{Window{Name: "w"}, b, "length must be positive"},
		{Window{Name: "w", Length: 7 * time.Minute}, b, "not a multiple of the bucket 5m"},
		{Window{Name: "w", Length: time.Hour, Lag: -b}, b, "lag must not be negative"},
		{Window{Name: "w", Length: time.Hour, Lag: time.Minute}, b, "lag 1m is not a multiple"},
		{Window{Name: "w", Length: 36 * time.Hour}, 24 * time.Hour, "length 1d12h is not a multiple of the bucket 1d"},
	} {
		err := c.win.Validate(c.bucket)
		switch {
		case c.wantErr == "" && err != nil:
			t.Errorf("%+v: %v", c.win, err)
		case c.wantErr != "" && (err == nil || !strings.Contains(err.Error(), c.wantErr)):
			t.Errorf("%+v: error %v, want one containing %q", c.win, err, c.wantErr)
		}
	}
}

func TestParseDuration(t *testing.T) {
	const day = 24 * time.Hour
	for _, c := range []struct {
		in   string
		want time.Duration
	}{
		{"5m", 5 * time.Minute},
		{"90m", 90 * time.Minute},
		{"0", 0},
		{"0d", 0},
		{"7d", 7 * day},
		{" 7d ", 7 * day},
		{"1d12h", 36 * time.Hour},
		{"1d12h30m", 36*time.Hour + 30*time.Minute},
		{"1.5d", 36 * time.Hour},
		{".25d", 6 * time.Hour},
		{"3.d", 3 * day},
		{"-2d", -2 * day},
		{"+2d", 2 * day},
		{"-1d6h", -30 * time.Hour},
		{"-1h", -time.Hour},
		// One nanosecond is 1.1574…e-14 of a day: exact decimal arithmetic, truncated.
		{"0.000000000000011575d", 1 * time.Nanosecond},
		{"0.000000000000011574d", 0},
		{"106751d", 106751 * day},
		{"-2562047h47m16.854775808s", time.Duration(-1 << 63)},
	} {
		got, err := ParseDuration(c.in)
		if err != nil || got != c.want {
			t.Errorf("ParseDuration(%q) = %v, %v; want %v", c.in, got, err, c.want)
		}
	}
	for _, bad := range []string{
		"", " ", "d", "-d", ".d", "d5h", "5", "5x", "1d1d", "1d-5h", "1d+5h", "1d 5h",
		"1e3d", "0x10d", "Infd", "NaNd", "1_000d", "--1d", "1..5d",
		"106752d", "106751d24h", "9999999999999999999999d",
	} {
		if d, err := ParseDuration(bad); err == nil {
			t.Errorf("ParseDuration(%q) = %v, want an error", bad, d)
		} else if !strings.Contains(err.Error(), "invalid duration") {
			t.Errorf("ParseDuration(%q) error %q does not say what failed", bad, err)
		}
	}
}

func TestFormatDuration(t *testing.T) {
	for _, c := range []struct {
		in   time.Duration
		want string
	}{
		{7 * 24 * time.Hour, "7d"},
		{24 * time.Hour, "1d"},
		{36 * time.Hour, "1d12h"},
		{5 * time.Minute, "5m"},
		{time.Hour + 30*time.Minute + 5*time.Second, "1h30m5s"},
		{8*24*time.Hour + time.Minute, "8d1m"},
		{1500 * time.Millisecond, "1.5s"},
		{0, "0s"},
		{-48 * time.Hour, "-48h0m0s"},
	} {
		got := FormatDuration(c.in)
		if got != c.want {
			t.Errorf("FormatDuration(%v) = %q, want %q", c.in, got, c.want)
		}
		back, err := ParseDuration(got)
		if err != nil || back != c.in {
			t.Errorf("ParseDuration(FormatDuration(%v)) = %v, %v", c.in, back, err)
		}
	}
}
