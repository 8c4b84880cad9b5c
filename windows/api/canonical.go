package api

import (
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"slices"
	"strconv"
	"unicode/utf16"
	"unicode/utf8"
)

// Canonical rewrites the JSON text data in the canonical form of RFC 8785
// (JSON Canonicalization Scheme): no insignificant white space, object
// members sorted by the UTF-16 code units of their names, numbers as
// ECMAScript prints them, strings with only the escapes JSON requires
// (quote, backslash, control characters) and lowercase \u00xx. The same
// figures always give the same bytes, whichever program wrote them.
func Canonical(data []byte) ([]byte, error) {
	dec := json.NewDecoder(bytes.NewReader(data))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return nil, fmt.Errorf("canonicalise: %w", err)
	}
	var b bytes.Buffer
	if err := writeCanonical(&b, v); err != nil {
		return nil, fmt.Errorf("canonicalise: %w", err)
	}
	return b.Bytes(), nil
}

// Fingerprint is the lowercase hex SHA-256 of Canonical(data).
func Fingerprint(data []byte) (string, error) {
	c, err := Canonical(data)
	if err != nil {
		return "", err
	}
	sum := sha256.Sum256(c)
	return hex.EncodeToString(sum[:]), nil
}

func writeCanonical(b *bytes.Buffer, v any) error {
	switch v := v.(type) {
	case nil:
		b.WriteString("null")
	case bool:
		b.WriteString(strconv.FormatBool(v))
	case json.Number:
		f, err := strconv.ParseFloat(string(v), 64)
		if err != nil {
			return err
		}
		// encoding/json prints a float64 as ECMAScript's Number.toString
		// does (its documented behaviour), which is RFC 8785's rule.
		out, err := json.Marshal(f)
		if err != nil {
			return err
		}
		b.Write(out)
	case string:
		writeCanonicalString(b, v)
	case []any:
		b.WriteByte('[')
		for i, e := range v {
			if i > 0 {
				b.WriteByte(',')
			}
			if err := writeCanonical(b, e); err != nil {
				return err
			}
		}
		b.WriteByte(']')
	case map[string]any:
		keys := make([]string, 0, len(v))
		for k := range v {
			keys = append(keys, k)
		}
		slices.SortFunc(keys, func(x, y string) int { return slices.Compare(utf16.Encode([]rune(x)), utf16.Encode([]rune(y))) })
		b.WriteByte('{')
		for i, k := range keys {
			if i > 0 {
				b.WriteByte(',')
			}
			writeCanonicalString(b, k)
			b.WriteByte(':')
			if err := writeCanonical(b, v[k]); err != nil {
				return err
			}
		}
		b.WriteByte('}')
	default:
		return fmt.Errorf("unexpected JSON value %T", v)
	}
	return nil
}

func writeCanonicalString(b *bytes.Buffer, s string) {
	b.WriteByte('"')
	for i := 0; i < len(s); {
		r, size := utf8.DecodeRuneInString(s[i:])
		i += size
		switch r {
		case '"':
			b.WriteString(`\"`)
		case '\\':
			b.WriteString(`\\`)
		case '\b':
			b.WriteString(`\b`)
		case '\f':
			b.WriteString(`\f`)
		case '\n':
			b.WriteString(`\n`)
		case '\r':
			b.WriteString(`\r`)
		case '\t':
			b.WriteString(`\t`)
		default:
			if r < 0x20 {
				fmt.Fprintf(b, `\u%04x`, r)
			} else {
				b.WriteRune(r)
			}
		}
	}
	b.WriteByte('"')
}
