// Package stats holds the intervals and tests classwatch puts beside its
// metrics: confidence intervals for a proportion, tests of homogeneity of two
// count vectors, distribution distances, the comparison of two proportions,
// and Benjamini–Hochberg control of the false discovery rate.
//
// Every function is pure and safe for concurrent use. Normal, chi-square
// and beta distributions come from gonum's distuv. Each function documents
// the reference implementation it agrees with; the golden tests under
// windows/testdata/reference hold those libraries' answers.
package stats
