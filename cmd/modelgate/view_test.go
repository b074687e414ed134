package main

import (
	"bytes"
	"context"
	"io"
	"net"
	"net/http"
	"strings"
	"sync"
	"testing"
	"time"
)

// startView runs `modelgate view` in this process until the test ends
// and returns its base URL and its stderr.
func startView(t *testing.T, store string, o *viewOptions) (string, *syncBuffer) {
	t.Helper()
	ctx, cancel := context.WithCancel(context.Background())
	addrs := make(chan net.Addr, 1)
	o.onListen = func(a net.Addr) { addrs <- a }
	stderr := &syncBuffer{}
	g := &globals{Store: store, Stdout: io.Discard, Stderr: stderr, Stdin: strings.NewReader("")}
	done := make(chan error, 1)
	go func() { done <- runView(ctx, g, o) }()
	t.Cleanup(func() {
		cancel()
		select {
		case err := <-done:
			if err != nil {
				t.Errorf("view ended with %v", err)
			}
		case <-time.After(30 * time.Second):
			t.Error("view did not stop")
		}
	})
	select {
	case a := <-addrs:
		return "http://" + a.String(), stderr
	case err := <-done:
		t.Fatalf("view ended before listening: %v\n%s", err, stderr.String())
	case <-time.After(30 * time.Second):
		t.Fatal("view did not listen")
	}
	return "", nil
}

// TestViewCommand serves a fixture store on loopback: pages answer, other
// methods get 405, a foreign Host header 421, and the server stops cleanly.
func TestViewCommand(t *testing.T) {
	dir, s := copyFixtureStore(t)
	scorer, err := s.Resolve(context.Background(), "podcast/promo-scorer", "candidate")
	if err != nil {
		t.Fatal(err)
	}
	base, stderr := startView(t, dir, &viewOptions{Addr: "127.0.0.1:0"})
	if !strings.Contains(stderr.String(), "read-only view") {
		t.Errorf("no start line on stderr: %q", stderr.String())
	}
	if strings.Contains(stderr.String(), "WITHOUT AUTHENTICATION") {
		t.Error("a loopback server warns about the network")
	}
	client := &http.Client{Timeout: time.Minute, CheckRedirect: func(*http.Request, []*http.Request) error { return http.ErrUseLastResponse }}
	for _, c := range []struct {
		method, path string
		host         string
		status       int
		want         string
	}{
		{"GET", "/", "", 200, `href="/tags/podcast/promo-scorer:candidate"`},
		{"GET", "/tags/podcast/promo-scorer:candidate", "", 200, "podcast/promo-scorer:candidate"},
		{"GET", "/artifacts/podcast/promo-scorer@" + scorer.Digest.String(), "", 200, `href="/artifacts/podcast/listener-encoder@`},
		{"GET", "/artifacts/podcast/promo-scorer@" + scorer.Digest.String(), "", 200, "modelgate show podcast/promo-scorer@" + scorer.Digest.String() + " --store " + dir},
		{"GET", "/candidates/podcast/promo-scorer@" + scorer.Digest.String(), "", 200, "No gate report names this model"},
		{"GET", "/artifacts/podcast/promo-scorer:candidate", "", 303, ""},
		{"GET", "/repositories/podcast/listener-encoder", "", 200, `href="/artifacts/podcast/listener-encoder@`},
		{"GET", "/artifacts/podcast/promo-scorer@sha256:" + strings.Repeat("0", 64), "", 404, ""},
		{"GET", "/artifacts/podcast/promo-scorer@sha256:0", "", 400, ""},
		{"HEAD", "/", "", 200, ""},
		{"POST", "/", "", 405, ""},
		{"DELETE", "/tags/podcast/promo-scorer:candidate", "", 405, ""},
		{"GET", "/", "rebound.example:8080", 421, ""},
		{"GET", "/", "localhost", 200, ""},
	} {
		req, err := http.NewRequest(c.method, base+c.path, nil)
		if err != nil {
			t.Fatal(err)
		}
		if c.host != "" {
			req.Host = c.host
		}
		res, err := client.Do(req)
		if err != nil {
			t.Fatalf("%s %s: %v", c.method, c.path, err)
		}
		body, _ := io.ReadAll(res.Body)
		res.Body.Close()
		if res.StatusCode != c.status {
			t.Errorf("%s %s (Host %q): %d, want %d", c.method, c.path, c.host, res.StatusCode, c.status)
		}
		if c.want != "" && !strings.Contains(string(body), c.want) {
			t.Errorf("%s %s: page lacks %q", c.method, c.path, c.want)
		}
		if res.Header.Get("Content-Security-Policy") == "" || res.Header.Get("X-Content-Type-Options") != "nosniff" {
			t.Errorf("%s %s: security headers missing: %v", c.method, c.path, res.Header)
		}
	}
}

// TestViewRefusesNetwork: a non-loopback address needs --public; with it
// the server warns on stderr that it has no authentication.
func TestViewRefusesNetwork(t *testing.T) {
	dir := t.TempDir()
	for _, addr := range []string{"0.0.0.0:0", ":0", "[::]:0", "192.0.2.1:8080", "example.invalid:80"} {
		code, _, stderr := runMG(t, "view", "--store", dir, "--addr", addr)
		if code != 2 || !strings.Contains(stderr, "--public") {
			t.Errorf("view --addr %s: exit %d, stderr %q; want 2 naming --public", addr, code, stderr)
		}
	}
	for _, args := range [][]string{{"--addr", "nonsense"}, {"--addr", "127.0.0.1:0", "--policy", dir + "/missing.yaml"}} {
		code, _, stderr := runMG(t, append([]string{"view", "--store", dir}, args...)...)
		if code != 2 {
			t.Errorf("view %v: exit %d, want 2 (%s)", args, code, stderr)
		}
	}
	_, stderr := startView(t, dir, &viewOptions{Addr: "0.0.0.0:0", Public: true})
	if !strings.Contains(stderr.String(), "WITHOUT AUTHENTICATION") {
		t.Errorf("--public gives no warning: %q", stderr.String())
	}
}

// TestServeAlias: the web view's former name still runs it for one
// release, hidden from the help, and says the new name on stderr.
func TestServeAlias(t *testing.T) {
	dir := t.TempDir()
	code, _, stderr := runMG(t, "serve", "--store", dir, "--addr", "0.0.0.0:0")
	if code != 2 || !strings.Contains(stderr, "modelgate view") || !strings.Contains(stderr, "--public") {
		t.Errorf("serve --addr 0.0.0.0:0: exit %d, stderr %q; want 2, the new name and the view's own refusal", code, stderr)
	}
	code, _, stderr = runMG(t, "serve", "--quiet", "--store", dir, "--addr", "nonsense")
	if code != 2 || !strings.Contains(stderr, "modelgate view") {
		t.Errorf("serve --quiet: exit %d, stderr %q; want the new name even so", code, stderr)
	}
	code, stdout, _ := runMG(t, "--help")
	if code != 0 || !strings.Contains(stdout, "  view ") || strings.Contains(stdout, "  serve ") {
		t.Errorf("help lists view and not serve? exit %d\n%s", code, stdout)
	}
	code, _, stderr = runMG(t, "view", "--store", dir, "--addr", "nonsense")
	if code != 2 || strings.Contains(stderr, "serve") {
		t.Errorf("view: exit %d, stderr %q; want 2 without the rename notice", code, stderr)
	}
}

// syncBuffer is a bytes.Buffer safe for a writer and a reader goroutine.
type syncBuffer struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuffer) Write(p []byte) (int, error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.Write(p)
}

func (s *syncBuffer) String() string {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.b.String()
}
