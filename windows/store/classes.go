package store

import (
	"fmt"
	"slices"
)

// MissingClasses returns the classes of want not in have, once each, in
// want's order: what EnsureModel has to register.
func MissingClasses(have, want []string) []string {
	var out []string
	for _, c := range want {
		if !slices.Contains(have, c) && !slices.Contains(out, c) {
			out = append(out, c)
		}
	}
	return out
}

// CheckClassLimit returns ErrTooManyClasses, naming model, when
// registering add next to have would pass maxClasses (0: no limit).
func CheckClassLimit(model string, have, add []string, maxClasses int) error {
	if maxClasses > 0 && len(have)+len(add) > maxClasses {
		return fmt.Errorf("model %q: registering %d more classes would pass the limit of %d: %w", model, len(add), maxClasses, ErrTooManyClasses)
	}
	return nil
}
