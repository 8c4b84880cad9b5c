package collector

import (
	"strconv"
	"unicode/utf8"
)

// The fast path of line decoding. Almost every line a client sends is a
// flat object whose keys are the schema's exact names, whose values are
// plain strings (and, for "scores", an object of numbers), with no escapes
// and no repeated key. scanPrediction and scanLabel decode that shape
// without reflection, taking every string as a substring of the line; they
// report false for anything else, which decodeStrict then decodes or
// rejects with its full messages. So a line the fast path accepts decodes to
// exactly what decodeStrict would give it (FuzzScanLine checks this), and
// the error messages stay decodeStrict's.

// Bits of the top-level keys already seen, to refuse repeats.
const (
	seenModel = 1 << iota
	seenID
	seenAt
	seenPredicted
	seenSegment
	seenScores
	seenActual
)

// scanPrediction decodes a prediction line of the common shape.
func scanPrediction(s string) (pl predictionLine, ok bool) {
	sc := lineScanner{s: s}
	var seen uint
	ok = sc.object(func(key string) bool {
		var bit uint
		var dst *string
		switch key {
		case "model":
			bit, dst = seenModel, &pl.Model
		case "id":
			bit, dst = seenID, &pl.ID
		case "at":
			bit, dst = seenAt, &pl.At
		case "predicted":
			bit, dst = seenPredicted, &pl.Predicted
		case "segment":
			bit, dst = seenSegment, &pl.Segment
		case "scores":
			bit = seenScores
		default:
			return false
		}
		if seen&bit != 0 {
			return false
		}
		seen |= bit
		if dst == nil {
			var ok bool
			pl.Scores, ok = sc.scores()
			return ok
		}
		var ok bool
		*dst, ok = sc.str()
		return ok
	})
	return pl, ok
}

// scanLabel decodes a label line of the common shape.
func scanLabel(s string) (ll labelLine, ok bool) {
	sc := lineScanner{s: s}
	var seen uint
	ok = sc.object(func(key string) bool {
		var bit uint
		var dst *string
		switch key {
		case "model":
			bit, dst = seenModel, &ll.Model
		case "id":
			bit, dst = seenID, &ll.ID
		case "actual":
			bit, dst = seenActual, &ll.Actual
		case "at":
			bit, dst = seenAt, &ll.At
		default:
			return false
		}
		if seen&bit != 0 {
			return false
		}
		seen |= bit
		var ok bool
		*dst, ok = sc.str()
		return ok
	})
	return ll, ok
}

// lineScanner reads JSON from s at i; each method reports false, with i
// anywhere, when the input is not of the shape it takes.
type lineScanner struct {
	s string
	i int
}

// object reads one object that makes up the whole input but for white
// space. member is called with the scanner at each member's value, which
// it must consume.
func (sc *lineScanner) object(member func(key string) bool) bool {
	sc.space()
	if !sc.eat('{') {
		return false
	}
	sc.space()
	if !sc.eat('}') {
		for {
			key, ok := sc.str()
			if !ok {
				return false
			}
			sc.space()
			if !sc.eat(':') {
				return false
			}
			sc.space()
			if !member(key) {
				return false
			}
			sc.space()
			if sc.eat('}') {
				break
			}
			if !sc.eat(',') {
				return false
			}
			sc.space()
		}
	}
	sc.space()
	return sc.i == len(sc.s)
}

// scores reads an object of numbers; a repeated key is left to the slow
// path, which rejects it.
func (sc *lineScanner) scores() (map[string]float64, bool) {
	if !sc.eat('{') {
		return nil, false
	}
	m := make(map[string]float64, 8)
	sc.space()
	if sc.eat('}') {
		return m, true
	}
	for {
		key, ok := sc.str()
		if !ok {
			return nil, false
		}
		sc.space()
		if !sc.eat(':') {
			return nil, false
		}
		sc.space()
		v, ok := sc.number()
		if !ok {
			return nil, false
		}
		if _, dup := m[key]; dup {
			return nil, false
		}
		m[key] = v
		sc.space()
		if sc.eat('}') {
			return m, true
		}
		if !sc.eat(',') {
			return nil, false
		}
		sc.space()
	}
}

// str reads a string without escapes or control characters, in valid
// UTF-8, and returns its contents.
func (sc *lineScanner) str() (string, bool) {
	if !sc.eat('"') {
		return "", false
	}
	start, ascii := sc.i, true
	for ; sc.i < len(sc.s); sc.i++ {
		switch b := sc.s[sc.i]; {
		case b == '"':
			v := sc.s[start:sc.i]
			sc.i++
			return v, ascii || utf8.ValidString(v)
		case b == '\\' || b < 0x20:
			return "", false
		case b >= utf8.RuneSelf:
			ascii = false
		}
	}
	return "", false
}

// number reads a JSON number that fits a float64.
func (sc *lineScanner) number() (float64, bool) {
	start := sc.i
	sc.eat('-')
	switch {
	case sc.eat('0'):
	case sc.digits() == 0:
		return 0, false
	}
	if sc.eat('.') && sc.digits() == 0 {
		return 0, false
	}
	if sc.eat('e') || sc.eat('E') {
		if !sc.eat('+') {
			sc.eat('-')
		}
		if sc.digits() == 0 {
			return 0, false
		}
	}
	v, err := strconv.ParseFloat(sc.s[start:sc.i], 64)
	return v, err == nil
}

// digits skips decimal digits and returns how many there were.
func (sc *lineScanner) digits() int {
	start := sc.i
	for sc.i < len(sc.s) && '0' <= sc.s[sc.i] && sc.s[sc.i] <= '9' {
		sc.i++
	}
	return sc.i - start
}

// eat skips b if it is next.
func (sc *lineScanner) eat(b byte) bool {
	if sc.i < len(sc.s) && sc.s[sc.i] == b {
		sc.i++
		return true
	}
	return false
}

// space skips JSON white space.
func (sc *lineScanner) space() {
	for sc.i < len(sc.s) {
		switch sc.s[sc.i] {
		case ' ', '\t', '\n', '\r':
			sc.i++
		default:
			return
		}
	}
}
