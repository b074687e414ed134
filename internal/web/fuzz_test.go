package web

import (
	"net/http"
	"net/http/httptest"
	"strings"
	"testing"
)

// FuzzServePaths: whatever the path and method, the view answers with a
// page or a 3xx/4xx, never a server error, and always with its CSP.
func FuzzServePaths(f *testing.F) {
	store, scorer, rep := hostileStore(f)
	s, err := New(store, Options{})
	if err != nil {
		f.Fatal(err)
	}
	for _, seed := range []string{"/", "/candidates", "/candidates/tiny-scorer@" + scorer, "/reports/tiny-scorer@" + rep,
		"/artifacts/tiny-scorer:cand", "/artifacts/tiny-scorer@sha256:zz", "/tags/tiny-scorer:cand", "/tags/x:y@sha256:" + strings.Repeat("0", 64),
		"/repositories/a/b/c", "/artifacts?repository=tiny-scorer&digest=" + scorer, "/static/style.css", "/%2e%2e/", "/artifacts/%00"} {
		f.Add("GET", seed)
	}
	f.Add("POST", "/")
	f.Fuzz(func(t *testing.T, method, path string) {
		if !strings.HasPrefix(path, "/") || strings.ContainsAny(path, " \t\r\n#") {
			return // not a request target a client can send
		}
		req, err := http.NewRequest(method, "http://127.0.0.1"+path, nil)
		if err != nil {
			return
		}
		rec := httptest.NewRecorder()
		s.ServeHTTP(rec, req)
		if rec.Code >= 500 {
			t.Errorf("%s %q: %d\n%s", method, path, rec.Code, rec.Body.String())
		}
		if rec.Header().Get("Content-Security-Policy") == "" {
			t.Errorf("%s %q: no CSP", method, path)
		}
	})
}
