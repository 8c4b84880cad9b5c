package windows

import (
	"fmt"
	"slices"
)

// Matrix is a confusion matrix over a fixed, ordered class list: rows are
// actual classes, columns predicted classes, both in Classes order. Counts
// are signed so that subtracting what was added is exact; a valid matrix
// never holds a negative cell.
//
// Cells are kept dense: a 100-class matrix is 10,000 int64s (80 KB), small
// beside the cost of a sparse map per cell, and every metric walks the
// matrix once per class, which a dense layout makes cache-friendly.
//
// A Matrix is not safe for concurrent mutation.
type Matrix struct {
	classes []string
	index   map[string]int
	cells   []int64 // row-major, len(classes)²
}

// NewMatrix returns an empty matrix over classes. It panics on a repeated
// class name, which is a programmer error: class lists come from the store's
// registry, which never repeats a name.
func NewMatrix(classes []string) *Matrix {
	m := &Matrix{
		classes: slices.Clone(classes),
		index:   make(map[string]int, len(classes)),
		cells:   make([]int64, len(classes)*len(classes)),
	}
	for i, c := range classes {
		if _, dup := m.index[c]; dup {
			panic(fmt.Sprintf("windows: class %q repeated", c))
		}
		m.index[c] = i
	}
	return m
}

// Classes returns the class order of both axes. The caller must not modify it.
func (m *Matrix) Classes() []string { return m.classes }

// Len returns the number of classes.
func (m *Matrix) Len() int { return len(m.classes) }

// Index returns the position of class c.
func (m *Matrix) Index(c string) (int, bool) {
	i, ok := m.index[c]
	return i, ok
}

// Add adds n (which may be negative) to cell (actual, predicted), by index.
func (m *Matrix) Add(actual, predicted int, n int64) {
	m.cells[actual*len(m.classes)+predicted] += n
}

// AddNamed adds n to the cell named by class names.
func (m *Matrix) AddNamed(actual, predicted string, n int64) error {
	a, ok := m.index[actual]
	if !ok {
		return fmt.Errorf("unknown actual class %q", actual)
	}
	p, ok := m.index[predicted]
	if !ok {
		return fmt.Errorf("unknown predicted class %q", predicted)
	}
	m.Add(a, p, n)
	return nil
}

// At returns cell (actual, predicted).
func (m *Matrix) At(actual, predicted int) int64 {
	return m.cells[actual*len(m.classes)+predicted]
}

// Row returns the number of examples whose actual class is k (its support).
func (m *Matrix) Row(k int) int64 {
	var s int64
	for _, v := range m.cells[k*len(m.classes) : (k+1)*len(m.classes)] {
		s += v
	}
	return s
}

// Col returns the number of labeled examples predicted as k.
func (m *Matrix) Col(k int) int64 {
	var s int64
	n := len(m.classes)
	for i := k; i < len(m.cells); i += n {
		s += m.cells[i]
	}
	return s
}

// Total returns the sum of all cells.
func (m *Matrix) Total() int64 {
	var s int64
	for _, v := range m.cells {
		s += v
	}
	return s
}

// Trace returns the sum of the diagonal (correct predictions).
func (m *Matrix) Trace() int64 {
	var s int64
	n := len(m.classes)
	for k := 0; k < n; k++ {
		s += m.cells[k*n+k]
	}
	return s
}

// Merge adds every cell of o to m. Both must share the same class list.
func (m *Matrix) Merge(o *Matrix) error {
	if !slices.Equal(m.classes, o.classes) {
		return fmt.Errorf("merge matrices: class lists differ")
	}
	for i, v := range o.cells {
		m.cells[i] += v
	}
	return nil
}

// Sub subtracts every cell of o from m. Both must share the same class list.
func (m *Matrix) Sub(o *Matrix) error {
	if !slices.Equal(m.classes, o.classes) {
		return fmt.Errorf("subtract matrices: class lists differ")
	}
	for i, v := range o.cells {
		m.cells[i] -= v
	}
	return nil
}

// Clone returns an independent copy.
func (m *Matrix) Clone() *Matrix {
	c := NewMatrix(m.classes)
	copy(c.cells, m.cells)
	return c
}

// Grow returns a copy over classes, which must start with m's classes in
// the same order (the registry only appends); new rows and columns are zero.
func (m *Matrix) Grow(classes []string) (*Matrix, error) {
	if len(classes) < len(m.classes) || !slices.Equal(classes[:len(m.classes)], m.classes) {
		return nil, fmt.Errorf("grow matrix: new class list does not extend the old one")
	}
	g := NewMatrix(classes)
	n := len(m.classes)
	for a := 0; a < n; a++ {
		for p := 0; p < n; p++ {
			g.Add(a, p, m.At(a, p))
		}
	}
	return g, nil
}

// Dense returns the cells as rows (actual) of columns (predicted).
func (m *Matrix) Dense() [][]int64 {
	n := len(m.classes)
	out := make([][]int64, n)
	for a := range out {
		out[a] = slices.Clone(m.cells[a*n : (a+1)*n])
	}
	return out
}
