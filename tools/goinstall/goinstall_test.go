// Package goinstall tests that `go install MODULE/cmd/modelgate@VERSION`
// works for the repository as published: the tree is packed into a module
// zip (the layout of the Go module proxy protocol, `go help goproxy`),
// served from a file:// proxy in front of the usual one, installed by the
// go command as a user would, and the installed binary is run.
package goinstall

import (
	"archive/zip"
	"bytes"
	"crypto/sha256"
	"encoding/hex"
	"encoding/json"
	"fmt"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"testing"
)

func TestGoInstall(t *testing.T) {
	if testing.Short() {
		t.Skip("compiles the whole tool under its module path")
	}
	root, err := filepath.Abs("../..")
	if err != nil {
		t.Fatal(err)
	}
	modPath := goOut(t, root, nil, "list", "-m")
	if !strings.Contains(strings.SplitN(modPath, "/", 2)[0], ".") {
		t.Fatalf("module path %q: its first element has no dot, so the go command cannot fetch it (go help importpath)", modPath)
	}
	files := strings.Split(goOut(t, root, nil, "list", "-m", "-f", "{{.Dir}}"), "\n")[0]
	if files != root {
		t.Fatalf("module root %s, want %s", files, root)
	}
	listed, err := exec.Command("git", "-C", root, "ls-files", "-z").Output()
	if err != nil {
		t.Skipf("not a git checkout (%v): the tree to publish is what git tracks", err)
	}

	// The proxy layout: MODULE/@v/list, VERSION.info, .mod, .zip.
	proxy := t.TempDir()
	dir := filepath.Join(proxy, filepath.FromSlash(modPath), "@v")
	if err := os.MkdirAll(dir, 0o755); err != nil {
		t.Fatal(err)
	}
	type file struct {
		name string
		data []byte
	}
	var tree []file
	sum := sha256.New()
	for _, name := range strings.Split(strings.TrimRight(string(listed), "\x00"), "\x00") {
		src := filepath.Join(root, filepath.FromSlash(name))
		fi, err := os.Lstat(src)
		if err != nil || !fi.Mode().IsRegular() {
			continue // deleted in the work tree, or a link: not in a module zip
		}
		b, err := os.ReadFile(src)
		if err != nil {
			t.Fatal(err)
		}
		tree = append(tree, file{name, b})
		fmt.Fprintf(sum, "%s\x00%d\x00", name, len(b))
		sum.Write(b)
	}
	// The version names the content: the go command keeps every version it
	// fetched in its module cache and never fetches one again, so a fixed
	// version would test the first tree it saw.
	version := "v0.1.0-installtest." + hex.EncodeToString(sum.Sum(nil))[:12]
	var zbuf bytes.Buffer
	zw := zip.NewWriter(&zbuf)
	for _, f := range tree {
		w, err := zw.Create(modPath + "@" + version + "/" + f.name)
		if err != nil {
			t.Fatal(err)
		}
		w.Write(f.data)
	}
	if err := zw.Close(); err != nil {
		t.Fatal(err)
	}
	gomod, err := os.ReadFile(filepath.Join(root, "go.mod"))
	if err != nil {
		t.Fatal(err)
	}
	info, _ := json.Marshal(map[string]string{"Version": version, "Time": "2026-12-01T00:00:00Z"})
	for name, b := range map[string][]byte{"list": []byte(version + "\n"), version + ".info": info, version + ".mod": gomod, version + ".zip": zbuf.Bytes()} {
		if err := os.WriteFile(filepath.Join(dir, name), b, 0o644); err != nil {
			t.Fatal(err)
		}
	}

	// Install as a user would, from outside any module; the dependencies
	// come from the module cache or the usual proxy.
	bin := t.TempDir()
	upstream := goOut(t, root, nil, "env", "GOPROXY")
	env := []string{
		"GOPROXY=file://" + filepath.ToSlash(proxy) + "," + upstream,
		"GONOSUMDB=" + modPath, "GOFLAGS=", "GOBIN=" + bin, "GOWORK=off",
	}
	goOut(t, t.TempDir(), env, "install", modPath+"/cmd/modelgate@"+version)
	out, err := exec.Command(filepath.Join(bin, "modelgate"), "--version").CombinedOutput()
	if err != nil {
		t.Fatalf("installed modelgate --version: %v\n%s", err, out)
	}
	// The version comes from the module's version when no -ldflags set it.
	if !strings.Contains(string(out), version) {
		t.Errorf("installed modelgate --version printed %q, want it to name %s", out, version)
	}
}

func goOut(t *testing.T, dir string, env []string, args ...string) string {
	t.Helper()
	cmd := exec.Command("go", args...)
	cmd.Dir = dir
	cmd.Env = append(os.Environ(), env...)
	var stderr bytes.Buffer
	cmd.Stderr = &stderr
	out, err := cmd.Output()
	if err != nil {
		t.Fatalf("go %s: %v\n%s", strings.Join(args, " "), err, stderr.String())
	}
	return strings.TrimSpace(string(out))
}
