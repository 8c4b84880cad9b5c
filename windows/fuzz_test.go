package windows

import (
	"fmt"
	"math"
	"testing"
	"time"
)

// The fuzz targets below keep their seed corpus in testdata/fuzz/<name>/;
// plain `go test` runs those seeds, `go test -fuzz=<name>` searches further.

// matrixFromBytes decodes a matrix of 1 to 8 classes with small non-negative
// cells (zeros common), plus optional unlabeled-prediction counts, from
// fuzz input.
func matrixFromBytes(data []byte) (m *Matrix, predicted []int64, confidence float64) {
	next := func() byte {
		if len(data) == 0 {
			return 0
		}
		b := data[0]
		data = data[1:]
		return b
	}
	k := 1 + int(next()%8)
	confidence = []float64{0.95, 0.9, 0.99, 0.5, 0.999999, 0.8, 0.95, 0.95}[next()%8]
	m = NewMatrix(classNames(k))
	for a := range k {
		for p := range k {
			// High bit set: a large count, to reach magnitudes where float
			// rounding matters; otherwise 0–15, mostly small.
			b := next()
			v := int64(b & 0x0f)
			if b&0x80 != 0 {
				v <<= 28
			}
			m.Add(a, p, v)
		}
	}
	if next()%2 == 1 {
		predicted = make([]int64, k)
		for c := range predicted {
			predicted[c] = m.Col(c) + int64(next()%4)
		}
	}
	return m, predicted, confidence
}

func FuzzCompute(f *testing.F) {
	f.Add([]byte{1, 0, 5, 0, 3, 0})
	f.Add([]byte{0, 0, 9, 1, 0, 0, 0})
	f.Add([]byte{7, 3, 0x8f, 0x81, 0, 0, 0x8f, 0, 0, 0, 0x8f})
	f.Fuzz(func(t *testing.T, data []byte) {
		m, predicted, confidence := matrixFromBytes(data)
		checkInvariants(t, m, predicted, Compute(m, predicted, confidence))
	})
}

// eventsFromBytes decodes (actual, predicted, n) events over k classes;
// n may be negative, as a correction's −1 is.
func eventsFromBytes(data []byte) (k int, events [][3]int64) {
	if len(data) == 0 {
		return 1, nil
	}
	k = 1 + int(data[0]%6)
	for data = data[1:]; len(data) >= 3; data = data[3:] {
		events = append(events, [3]int64{int64(data[0]) % int64(k), int64(data[1]) % int64(k), int64(int8(data[2]))})
	}
	return k, events
}

func FuzzMatrixEvents(f *testing.F) {
	f.Add([]byte{1, 0, 0, 5, 0, 1, 3, 1, 1, 0xff})
	f.Add([]byte{4, 3, 2, 1, 2, 3, 0x80, 4, 4, 0x7f, 0, 1, 2})
	f.Fuzz(func(t *testing.T, data []byte) {
		k, events := eventsFromBytes(data)
		classes := classNames(k)
		all, first, second := NewMatrix(classes), NewMatrix(classes), NewMatrix(classes)
		var total int64
		for i, e := range events {
			all.Add(int(e[0]), int(e[1]), e[2])
			if i%2 == 0 {
				first.Add(int(e[0]), int(e[1]), e[2])
			} else {
				second.Add(int(e[0]), int(e[1]), e[2])
			}
			total += e[2]
		}
		if all.Total() != total {
			t.Errorf("Total %d, want %d", all.Total(), total)
		}
		var rows, cols int64
		for c := range k {
			rows += all.Row(c)
			cols += all.Col(c)
		}
		if rows != total || cols != total {
			t.Errorf("rows add to %d, columns to %d; want %d", rows, cols, total)
		}
		// Merging the matrices of two halves equals adding every event.
		merged := first.Clone()
		if err := merged.Merge(second); err != nil {
			t.Fatal(err)
		}
		if fmt.Sprint(merged.Dense()) != fmt.Sprint(all.Dense()) {
			t.Errorf("merged halves %v, all events %v", merged.Dense(), all.Dense())
		}
		// Subtracting what was added restores the matrix.
		if err := merged.Sub(second); err != nil {
			t.Fatal(err)
		}
		if fmt.Sprint(merged.Dense()) != fmt.Sprint(first.Dense()) {
			t.Errorf("after Sub %v, want %v", merged.Dense(), first.Dense())
		}
	})
}

func FuzzParseDuration(f *testing.F) {
	for _, s := range []string{"7d", "1d12h", "1.5d", "-2d", "90m", "", "d", "Infd", "1d-5h", "-2562047h47m16.854775808s"} {
		f.Add(s)
	}
	f.Fuzz(func(t *testing.T, s string) {
		d, err := ParseDuration(s)
		if err != nil {
			return
		}
		// Whatever parses prints back to the same duration.
		back, err := ParseDuration(FormatDuration(d))
		if err != nil || back != d {
			t.Errorf("ParseDuration(%q) = %v; FormatDuration gives %q, which parses to %v, %v", s, d, FormatDuration(d), back, err)
		}
	})
}

func FuzzFormatDuration(f *testing.F) {
	for _, d := range []int64{0, 1, -1, int64(24 * time.Hour), int64(36 * time.Hour), math.MaxInt64, math.MinInt64} {
		f.Add(d)
	}
	f.Fuzz(func(t *testing.T, ns int64) {
		d := time.Duration(ns)
		back, err := ParseDuration(FormatDuration(d))
		if err != nil || back != d {
			t.Errorf("ParseDuration(FormatDuration(%d) = %q) = %v, %v", ns, FormatDuration(d), back, err)
		}
	})
}

func FuzzBucketStart(f *testing.F) {
	f.Add(int64(0), int64(300e9), int32(0))
	f.Add(int64(-1), int64(300e9), int32(19800))
	f.Add(int64(-86400e9-1), int64(86400e9), int32(-34200))
	f.Add(int64(1772366400e9), int64(7), int32(3600))
	f.Fuzz(func(t *testing.T, ns, bucket int64, offset int32) {
		if bucket <= 0 {
			return
		}
		// Keep t + bucket inside the int64 nanosecond range BucketStart
		// documents.
		if ns > math.MaxInt64-bucket || ns < math.MinInt64+bucket {
			return
		}
		zone := time.FixedZone("fuzz", int(offset%(18*3600)))
		checkBucketStart(t, time.Unix(0, ns).In(zone), time.Duration(bucket))
		if w := Watermark(time.Unix(0, ns), time.Duration(bucket)); !w.After(time.Unix(0, ns)) {
			t.Errorf("Watermark(%d, %d) = %s is not after the latest time", ns, bucket, w)
		}
	})
}
