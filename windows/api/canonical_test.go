package api_test

import (
	"testing"

	"github.com/classwatch/classwatch/windows/api"
)

// TestCanonicalRFC8785 checks the canonical form against the example of
// RFC 8785 section 3.2.2 (input and output quoted from memory of the RFC).
func TestCanonicalRFC8785(t *testing.T) {
	in := `{
  "numbers": [333333333.33333329, 1E30, 4.50, 2e-3, 0.000000000000000000000000001],
  "string": "\u20ac$\u000F\u000aA'\u0042\u0022\u005c\\\"\/",
  "literals": [null, true, false]
}`
	want := `{"literals":[null,true,false],"numbers":[333333333.3333333,1e+30,4.5,0.002,1e-27],"string":"€$\u000f\nA'B\"\\\\\"/"}`
	got, err := api.Canonical([]byte(in))
	if err != nil {
		t.Fatal(err)
	}
	if string(got) != want {
		t.Errorf("Canonical =\n%s\nwant\n%s", got, want)
	}
}

// TestCanonicalSortsByUTF16 checks member order by UTF-16 code units, where
// it differs from UTF-8 byte order: U+1F600 (surrogates D83D DE00) sorts
// before U+FB01 in UTF-16, after it in UTF-8 (RFC 8785 section 3.2.3).
func TestCanonicalSortsByUTF16(t *testing.T) {
	got, err := api.Canonical([]byte(`{"\ufb01":1,"\ud83d\ude00":2,"a":3}`))
	if err != nil {
		t.Fatal(err)
	}
	if want := "{\"a\":3,\"\U0001F600\":2,\"\uFB01\":1}"; string(got) != want {
		t.Errorf("Canonical = %s, want %s", got, want)
	}
	if _, err := api.Canonical([]byte(`{"a":`)); err == nil {
		t.Error("Canonical of broken JSON: no error")
	}
}
