package windows

import (
	"fmt"
	"slices"
	"strings"
	"testing"
)

func TestMatrixCounts(t *testing.T) {
	m := NewMatrix([]string{"legit", "fraud", "review"})
	// Cells as (actual, predicted, count); rows actual, columns predicted.
	for _, e := range []struct {
		a, p string
		n    int64
	}{
		{"legit", "legit", 90}, {"legit", "fraud", 4}, {"fraud", "fraud", 7},
		{"fraud", "legit", 3}, {"review", "fraud", 2}, {"legit", "legit", 10},
	} {
		if err := m.AddNamed(e.a, e.p, e.n); err != nil {
			t.Fatal(err)
		}
	}
	want := [][]int64{{100, 4, 0}, {3, 7, 0}, {0, 2, 0}}
	if got := m.Dense(); fmt.Sprint(got) != fmt.Sprint(want) {
		t.Fatalf("Dense() = %v, want %v", got, want)
	}
	for k, w := range []struct{ row, col int64 }{{104, 103}, {10, 13}, {2, 0}} {
		if m.Row(k) != w.row || m.Col(k) != w.col {
			t.Errorf("class %d: Row %d, Col %d; want %d, %d", k, m.Row(k), m.Col(k), w.row, w.col)
		}
	}
	if m.Total() != 116 || m.Trace() != 107 || m.Len() != 3 {
		t.Errorf("Total %d, Trace %d, Len %d; want 116, 107, 3", m.Total(), m.Trace(), m.Len())
	}
	if i, ok := m.Index("review"); !ok || i != 2 {
		t.Errorf("Index(review) = %d, %v", i, ok)
	}
	if _, ok := m.Index("spam"); ok {
		t.Error("Index(spam) found")
	}
	// Dense returns a copy.
	m.Dense()[0][0] = -1
	if m.At(0, 0) != 100 {
		t.Error("Dense aliases the cells")
	}
}

func TestMatrixAddNamedUnknown(t *testing.T) {
	m := NewMatrix([]string{"a", "b"})
	if err := m.AddNamed("c", "a", 1); err == nil || !strings.Contains(err.Error(), `actual class "c"`) {
		t.Errorf("unknown actual: %v", err)
	}
	if err := m.AddNamed("a", "c", 1); err == nil || !strings.Contains(err.Error(), `predicted class "c"`) {
		t.Errorf("unknown predicted: %v", err)
	}
	if m.Total() != 0 {
		t.Errorf("a rejected add changed the matrix: %v", m.Dense())
	}
}

func TestNewMatrixRepeatedClassPanics(t *testing.T) {
	defer func() {
		if recover() == nil {
			t.Error("NewMatrix with a repeated class did not panic")
		}
	}()
	NewMatrix([]string{"a", "b", "a"})
}

func TestMatrixMergeSub(t *testing.T) {
	classes := []string{"a", "b"}
	m := NewMatrix(classes)
	m.Add(0, 0, 5)
	m.Add(1, 0, 2)
	o := NewMatrix(classes)
	o.Add(1, 0, 3)
	o.Add(1, 1, 4)
	before := m.Dense()
	if err := m.Merge(o); err != nil {
		t.Fatal(err)
	}
	if got, want := fmt.Sprint(m.Dense()), "[[5 0] [5 4]]"; got != want {
		t.Errorf("after Merge %s, want %s", got, want)
	}
	if err := m.Sub(o); err != nil {
		t.Fatal(err)
	}
	if fmt.Sprint(m.Dense()) != fmt.Sprint(before) {
		t.Errorf("after Merge and Sub %v, want %v", m.Dense(), before)
	}
	other := NewMatrix([]string{"b", "a"})
	if err := m.Merge(other); err == nil {
		t.Error("Merge of a different class order: no error")
	}
	if err := m.Sub(NewMatrix([]string{"a"})); err == nil {
		t.Error("Sub of a different class list: no error")
	}
}

func TestMatrixCloneIsIndependent(t *testing.T) {
	classes := []string{"a", "b"}
	m := NewMatrix(classes)
	m.Add(0, 1, 2)
	c := m.Clone()
	c.Add(0, 1, 5)
	classes[0] = "changed"
	if m.At(0, 1) != 2 || c.At(0, 1) != 7 {
		t.Errorf("original %d, clone %d; want 2, 7", m.At(0, 1), c.At(0, 1))
	}
	if m.Classes()[0] != "a" || c.Classes()[0] != "a" {
		t.Errorf("class list aliased by NewMatrix: %v, %v", m.Classes(), c.Classes())
	}
}

func TestMatrixGrow(t *testing.T) {
	m := NewMatrix([]string{"a", "b"})
	m.Add(0, 0, 1)
	m.Add(0, 1, 2)
	m.Add(1, 0, 3)
	m.Add(1, 1, 4)
	g, err := m.Grow([]string{"a", "b", "c"})
	if err != nil {
		t.Fatal(err)
	}
	if got, want := fmt.Sprint(g.Dense()), "[[1 2 0] [3 4 0] [0 0 0]]"; got != want {
		t.Errorf("Grow = %s, want %s", got, want)
	}
	if !slices.Equal(g.Classes(), []string{"a", "b", "c"}) {
		t.Errorf("Grow classes = %v", g.Classes())
	}
	for _, bad := range [][]string{{"a"}, {"b", "a", "c"}, {"a", "x", "b"}} {
		if _, err := m.Grow(bad); err == nil {
			t.Errorf("Grow(%v): no error", bad)
		}
	}
}
