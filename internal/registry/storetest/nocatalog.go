package storetest

import (
	"net/http"
	"strings"
)

// NoCatalog wraps a registry's HTTP handler so that it refuses the catalog
// endpoint as many hosted registries do: GET /v2/_catalog answers 404 with
// the distribution spec's UNSUPPORTED error code (OCI distribution-spec
// v1.1, "Error Codes"; the catalog is not part of that spec at all, which
// is why registries may leave it out). Every other request passes through.
func NoCatalog(h http.Handler) http.Handler {
	return http.HandlerFunc(func(w http.ResponseWriter, r *http.Request) {
		if strings.TrimSuffix(r.URL.Path, "/") == "/v2/_catalog" {
			w.Header().Set("Content-Type", "application/json")
			w.WriteHeader(http.StatusNotFound)
			_, _ = w.Write([]byte(`{"errors":[{"code":"UNSUPPORTED","message":"the catalog is not available on this registry"}]}`))
			return
		}
		h.ServeHTTP(w, r)
	})
}
