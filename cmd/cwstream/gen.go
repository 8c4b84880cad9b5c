package main

import (
	"bytes"
	"fmt"
	"strconv"
	"time"
)

// parcelClasses are the classes of every model.
var parcelClasses = []string{"intact", "dented", "crushed", "wet", "torn", "open"}

// traffic generates the same events for any model set: prediction i goes
// to model i % models, at times spread over the last span.
type traffic struct {
	n, models int
	labeled   int // predictions 0 .. labeled-1 get a label
	seed      uint64
	end       time.Time
	span      time.Duration
}

// mix is splitmix64: a fixed, well-spread hash of an index.
func mix(x uint64) uint64 {
	x += 0x9e3779b97f4a7c15
	x = (x ^ (x >> 30)) * 0xbf58476d1ce4e5b9
	x = (x ^ (x >> 27)) * 0x94d049bb133111eb
	return x ^ (x >> 31)
}

func (t traffic) at(i int) time.Time {
	return t.end.Add(-t.span + time.Duration(float64(t.span)*float64(i)/float64(t.n))).Truncate(time.Second)
}

// batch is the lines of one body: one model's predictions (or labels) with
// indexes first, first+models, ... of count lines.
type batch struct {
	model, first, count int
}

// batches splits n events per model into bodies of size lines.
func (t traffic) batches(size int, labels bool) []batch {
	per := t.n / t.models
	if labels {
		per = (t.labeled + t.models - 1) / t.models
	}
	var out []batch
	for m := range t.models {
		for j := 0; j < per; j += size {
			b := batch{model: m, first: j*t.models + m, count: min(size, per-j)}
			last := b.first + (b.count-1)*t.models
			if labels && last >= t.labeled {
				b.count -= (last-t.labeled)/t.models + 1
			}
			if b.count > 0 {
				out = append(out, b)
			}
		}
	}
	return out
}

// body renders a batch for the model set named by prefix ("h", "s", "o").
func (t traffic) body(prefix string, b batch, labels bool) []byte {
	var buf bytes.Buffer
	buf.Grow(b.count * 120)
	model := fmt.Sprintf("%s-dock-%d", prefix, b.model+1)
	for k := range b.count {
		i := b.first + k*t.models
		h := mix(t.seed ^ uint64(i))
		predicted := parcelClasses[h%uint64(len(parcelClasses))]
		id := "parcel-" + strconv.Itoa(i)
		if !labels {
			fmt.Fprintf(&buf, `{"model":%q,"id":%q,"at":%q,"predicted":%q}`+"\n", model, id, t.at(i).Format(time.RFC3339), predicted)
			continue
		}
		actual := predicted
		if h2 := mix(h); h2%10 >= 8 {
			actual = parcelClasses[h2%uint64(len(parcelClasses))]
		}
		fmt.Fprintf(&buf, `{"model":%q,"id":%q,"at":%q,"actual":%q}`+"\n", model, id, t.at(i).Add(time.Minute).Format(time.RFC3339), actual)
	}
	return buf.Bytes()
}

// lines counts the lines of batches.
func lines(bs []batch) int {
	n := 0
	for _, b := range bs {
		n += b.count
	}
	return n
}
