package store

import (
	"encoding/json"
	"strconv"
)

// ParseScores decodes stored scores: a flat JSON object of numbers, as
// the stores write it and PostgreSQL prints a jsonb value
// ({"fraud": 0.8, "legit": 0.2}). A label batch decodes one per label, and
// encoding/json's reflection cost more client CPU than the rest of the
// label's work; this reads the common shape directly. Anything else (an escaped key, a value that is not a
// plain number) goes to encoding/json. Both parse numbers with
// strconv.ParseFloat, so the floats, and the sums built from them, are the
// same either way.
func ParseScores(raw []byte) (map[string]float64, error) {
	out := make(map[string]float64, 16)
	i := skipSpace(raw, 0)
	if i >= len(raw) || raw[i] != '{' {
		return parseScoresSlow(raw)
	}
	i = skipSpace(raw, i+1)
	if i < len(raw) && raw[i] == '}' {
		return endScores(raw, i, out)
	}
	for {
		if i >= len(raw) || raw[i] != '"' {
			return parseScoresSlow(raw)
		}
		j := i + 1
		for j < len(raw) && raw[j] != '"' && raw[j] != '\\' && raw[j] >= 0x20 {
			j++
		}
		if j >= len(raw) || raw[j] != '"' {
			return parseScoresSlow(raw)
		}
		key := string(raw[i+1 : j])
		i = skipSpace(raw, j+1)
		if i >= len(raw) || raw[i] != ':' {
			return parseScoresSlow(raw)
		}
		i = skipSpace(raw, i+1)
		k := i
		for k < len(raw) && numberByte(raw[k]) {
			k++
		}
		v, err := strconv.ParseFloat(string(raw[i:k]), 64)
		if err != nil || k == i || raw[i] == '+' || raw[i] == '.' {
			return parseScoresSlow(raw)
		}
		out[key] = v
		i = skipSpace(raw, k)
		switch {
		case i < len(raw) && raw[i] == ',':
			i = skipSpace(raw, i+1)
		case i < len(raw) && raw[i] == '}':
			return endScores(raw, i, out)
		default:
			return parseScoresSlow(raw)
		}
	}
}

// endScores returns out when the closing brace at i ends raw.
func endScores(raw []byte, i int, out map[string]float64) (map[string]float64, error) {
	if skipSpace(raw, i+1) != len(raw) {
		return parseScoresSlow(raw)
	}
	return out, nil
}

func parseScoresSlow(raw []byte) (map[string]float64, error) {
	var out map[string]float64
	err := json.Unmarshal(raw, &out)
	return out, err
}

func skipSpace(b []byte, i int) int {
	for i < len(b) && (b[i] == ' ' || b[i] == '\t' || b[i] == '\n' || b[i] == '\r') {
		i++
	}
	return i
}

// numberByte reports whether c may appear in a JSON number.
func numberByte(c byte) bool {
	return c >= '0' && c <= '9' || c == '-' || c == '+' || c == '.' || c == 'e' || c == 'E'
}
