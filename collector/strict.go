package collector

import (
	"encoding/json"
	"errors"
	"fmt"
	"strconv"
	"strings"
	"unicode/utf16"
	"unicode/utf8"
)

// The slow path of line decoding, for lines the fast path (scan.go) does
// not take. encoding/json alone would let through what the line rules
// forbid: it replaces invalid UTF-8 and lone UTF-16 surrogates with U+FFFD
// (so two ids could become one), keeps the last of repeated keys, and
// matches field names without regard to case. strictLine refuses those
// first, then json.Unmarshal decodes; the same rules hold whichever store
// is behind the collector.

// maxDepth bounds the nesting strictLine walks; the line schema needs two
// levels.
const maxDepth = 32

// decodeLine decodes one JSON object into v, whose top-level fields are
// fields and whose field nested, if not empty, is an object of numbers.
func decodeLine(data []byte, v any, fields []string, nested string) error {
	if !json.Valid(data) {
		return describeJSONError(json.Unmarshal(data, v))
	}
	if err := strictLine(string(data), fields, nested); err != nil {
		// The model, when it can be read, still names the line in metrics.
		var named struct {
			Model string `json:"model"`
		}
		if json.Unmarshal(data, &named) == nil {
			setModel(v, named.Model)
		}
		return err
	}
	if err := json.Unmarshal(data, v); err != nil {
		return describeJSONError(err)
	}
	return nil
}

// strictLine checks a line that is valid JSON: UTF-8, no lone surrogate
// escapes, only the exact field names, none twice, and no key twice in the
// nested object. A line that is not an object is left to json.Unmarshal.
func strictLine(s string, fields []string, nested string) error {
	if !utf8.ValidString(s) {
		return errors.New("line is not valid UTF-8")
	}
	sc := strictScanner{lineScanner{s: s}}
	sc.space()
	if !sc.eat('{') {
		return sc.skip(0) // a scalar or array: only its strings are checked
	}
	seen := make([]string, 0, len(fields))
	return sc.members(func(key string) error {
		if !contains(fields, key) {
			for _, f := range fields {
				if strings.EqualFold(f, key) {
					return fmt.Errorf("unknown field %q (field names are case-sensitive: %q)", key, f)
				}
			}
			return fmt.Errorf("unknown field %q", key)
		}
		if contains(seen, key) {
			return fmt.Errorf("field %q appears twice", key)
		}
		seen = append(seen, key)
		if key == nested && sc.peek() == '{' {
			sc.i++
			var keys []string
			return sc.members(func(k string) error {
				if contains(keys, k) {
					return fmt.Errorf("%q: %q appears twice", nested, k)
				}
				keys = append(keys, k)
				return sc.skip(1)
			})
		}
		return sc.skip(1)
	})
}

func contains(list []string, s string) bool {
	for _, x := range list {
		if x == s {
			return true
		}
	}
	return false
}

// strictScanner walks valid JSON, decoding strings to check them.
type strictScanner struct{ lineScanner }

func (sc *strictScanner) peek() byte {
	if sc.i < len(sc.s) {
		return sc.s[sc.i]
	}
	return 0
}

// members reads the members of an object whose '{' was read, calling
// member at each value, which it must consume.
func (sc *strictScanner) members(member func(key string) error) error {
	sc.space()
	if sc.eat('}') {
		return nil
	}
	for {
		sc.space()
		key, err := sc.text()
		if err != nil {
			return err
		}
		sc.space()
		sc.eat(':')
		sc.space()
		if err := member(key); err != nil {
			return err
		}
		sc.space()
		if sc.eat('}') {
			return nil
		}
		if !sc.eat(',') {
			return errors.New("invalid JSON object")
		}
	}
}

// skip consumes one value at nesting depth, checking its strings.
func (sc *strictScanner) skip(depth int) error {
	if depth > maxDepth {
		return fmt.Errorf("JSON is nested more than %d levels deep", maxDepth)
	}
	sc.space()
	switch sc.peek() {
	case '"':
		_, err := sc.text()
		return err
	case '{':
		sc.i++
		return sc.members(func(string) error { return sc.skip(depth + 1) })
	case '[':
		sc.i++
		sc.space()
		if sc.eat(']') {
			return nil
		}
		for {
			if err := sc.skip(depth + 1); err != nil {
				return err
			}
			sc.space()
			if sc.eat(']') {
				return nil
			}
			if !sc.eat(',') {
				return errors.New("invalid JSON array")
			}
		}
	}
	for sc.i < len(sc.s) && !strings.ContainsRune(",}] \t\r\n", rune(sc.s[sc.i])) {
		sc.i++ // a number, true, false or null
	}
	return nil
}

// text reads a string of valid JSON and decodes its escapes, refusing a
// lone UTF-16 surrogate (which encoding/json would turn into U+FFFD).
func (sc *strictScanner) text() (string, error) {
	if !sc.eat('"') {
		return "", errors.New("invalid JSON string")
	}
	var b strings.Builder
	start := sc.i
	for sc.i < len(sc.s) {
		switch c := sc.s[sc.i]; c {
		case '"':
			if start >= 0 {
				v := sc.s[start:sc.i]
				sc.i++
				return v, nil
			}
			sc.i++
			return b.String(), nil
		case '\\':
			if start >= 0 {
				b.WriteString(sc.s[start:sc.i])
				start = -1
			}
			r, n, err := unescape(sc.s[sc.i:])
			if err != nil {
				return "", err
			}
			b.WriteRune(r)
			sc.i += n
		default:
			if start < 0 {
				b.WriteByte(c)
			}
			sc.i++
		}
	}
	return "", errors.New("invalid JSON string")
}

// unescape decodes the escape at the start of s and returns the rune and
// the bytes it took.
func unescape(s string) (rune, int, error) {
	if len(s) < 2 {
		return 0, 0, errors.New("invalid JSON escape")
	}
	switch s[1] {
	case 'u':
		r, ok := hex4(s[2:])
		if !ok {
			return 0, 0, errors.New("invalid JSON escape")
		}
		if !utf16.IsSurrogate(r) {
			return r, 6, nil
		}
		if r < 0xdc00 && len(s) >= 12 && s[6] == '\\' && s[7] == 'u' {
			if lo, ok := hex4(s[8:]); ok && lo >= 0xdc00 && lo <= 0xdfff {
				return utf16.DecodeRune(r, lo), 12, nil
			}
		}
		return 0, 0, fmt.Errorf(`string holds a lone UTF-16 surrogate \u%04x`, r)
	case 'b':
		return '\b', 2, nil
	case 'f':
		return '\f', 2, nil
	case 'n':
		return '\n', 2, nil
	case 'r':
		return '\r', 2, nil
	case 't':
		return '\t', 2, nil
	}
	return rune(s[1]), 2, nil // '"', '\\' and '/'
}

func hex4(s string) (rune, bool) {
	if len(s) < 4 {
		return 0, false
	}
	v, err := strconv.ParseUint(s[:4], 16, 32)
	return rune(v), err == nil
}

// checkText refuses control characters (C0, DEL and C1) in a value that
// names something: an id, segment, model or class.
func checkText(field, s string) error {
	for i := 0; i < len(s); i++ {
		c := s[i]
		if c < 0x20 || c == 0x7f || c == 0xc2 && i+1 < len(s) && s[i+1] >= 0x80 && s[i+1] <= 0x9f {
			r, _ := utf8.DecodeRuneInString(s[i:])
			return fmt.Errorf("%s holds the control character U+%04X", field, r)
		}
	}
	return nil
}

// setModel sets the Model field of a wire line.
func setModel(v any, model string) {
	switch l := v.(type) {
	case *predictionLine:
		l.Model = model
	case *labelLine:
		l.Model = model
	}
}
