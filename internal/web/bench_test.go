package web

import (
	"net/http"
	"testing"

	"modelgate/internal/policy"
)

// BenchmarkServePages times the heaviest pages over the demo store: the
// tag list (every tag's release log verified) and a candidate (its gate
// report, approvals judged).
func BenchmarkServePages(b *testing.B) {
	f := demoStore(b)
	s := newServer(b, f.store, Options{Policies: []*policy.Policy{f.policy}})
	for _, p := range []struct{ name, path string }{
		{"tags", "/"}, {"candidates", "/candidates"}, {"candidate", "/candidates/promo-scorer@" + f.better},
		{"report", "/reports/promo-scorer@" + f.reports[f.better]}, {"artifact", "/artifacts/promo-scorer@" + f.better},
	} {
		b.Run(p.name, func(b *testing.B) {
			for b.Loop() {
				if r := get(b, s, p.path); r.status != http.StatusOK {
					b.Fatalf("%s: %d", p.path, r.status)
				}
			}
		})
	}
}
