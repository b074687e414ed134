package registry

import "testing"

// FuzzParseRef: reference parsing never panics, and every reference it
// accepts prints back to a string that parses to the same reference.
func FuzzParseRef(f *testing.F) {
	for _, s := range []string{"promo-scorer:prod", "podcasts/listener-encoder:v1",
		"a@sha256:" + "0123456789abcdef0123456789abcdef0123456789abcdef0123456789abcdef",
		"a:b@sha256:" + "0123456789abcdef0123456789abcdef0123456789abcdef0123456789abcdef",
		"A:b", "a:-b", "a//b:c", "a:", ":b", "a@sha256:12", "localhost:5000/a:b"} {
		f.Add(s, false)
		f.Add(s, true)
	}
	f.Fuzz(func(t *testing.T, s string, bare bool) {
		r, err := ParseRef(s, bare)
		if err != nil {
			return
		}
		if err := ValidateRepository(r.Repository); err != nil {
			t.Fatalf("%q: accepted repository %q: %v", s, r.Repository, err)
		}
		if r.Tag != "" {
			if err := ValidateTag(r.Tag); err != nil {
				t.Fatalf("%q: accepted tag %q: %v", s, r.Tag, err)
			}
		}
		back, err := ParseRef(r.String(), bare)
		if err != nil || back != r {
			t.Fatalf("%q → %+v → %q → %+v, %v", s, r, r.String(), back, err)
		}
	})
}
