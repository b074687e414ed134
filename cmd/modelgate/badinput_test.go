package main

import (
	"bytes"
	"encoding/binary"
	"encoding/json"
	"math"
	"os"
	"os/exec"
	"path/filepath"
	"strings"
	"sync"
	"syscall"
	"testing"

	"github.com/modelgate/modelgate/internal/fixture"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
)

// copyDir copies a flat model directory.
func copyDir(t *testing.T, src string) string {
	t.Helper()
	dst := filepath.Join(t.TempDir(), filepath.Base(src))
	if err := os.MkdirAll(dst, 0o755); err != nil {
		t.Fatal(err)
	}
	es, err := os.ReadDir(src)
	if err != nil {
		t.Fatal(err)
	}
	for _, e := range es {
		b, err := os.ReadFile(filepath.Join(src, e.Name()))
		if err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(filepath.Join(dst, e.Name()), b, 0o644); err != nil {
			t.Fatal(err)
		}
	}
	return dst
}

func editJSON(t *testing.T, path string, edit func(m map[string]any)) {
	t.Helper()
	b, err := os.ReadFile(path)
	if err != nil {
		t.Fatal(err)
	}
	var m map[string]any
	if err := json.Unmarshal(b, &m); err != nil {
		t.Fatal(err)
	}
	edit(m)
	out, _ := json.MarshalIndent(m, "", "  ")
	if err := os.WriteFile(path, out, 0o644); err != nil {
		t.Fatal(err)
	}
}

// rawSafetensors builds a safetensors file by hand from a header and a buffer.
func rawSafetensors(header string, buf []byte) []byte {
	var b bytes.Buffer
	binary.Write(&b, binary.LittleEndian, uint64(len(header)))
	b.WriteString(header)
	b.Write(buf)
	return b.Bytes()
}

func TestBadInputChangesNothing(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, scorerDir := fixtures(t)
	mustMG(t, store, "push", encDir, "tiny-encoder:v1")

	cases := []struct {
		name  string
		setup func(t *testing.T) (dir, ref string)
		code  int
		want  []string // every string must appear in stderr
	}{
		{"spec not JSON", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			os.WriteFile(filepath.Join(d, "spec.json"), []byte(`{"kind": "encoder",`), 0o644)
			return d, "bad:v1"
		}, 2, []string{"spec.json", "not valid JSON"}},
		{"schema violations all listed with pointers", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["kind"] = "decoder"
				m["tensors"].([]any)[0].(map[string]any)["dtype"] = "F64"
				delete(m, "output")
			})
			return d, "bad:v1"
		}, 2, []string{"spec.json", "/kind", "/tensors/0/dtype", "output"}},
		{"tensor shape disagrees with spec", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["tensors"].([]any)[1].(map[string]any)["shape"] = []any{5}
			})
			return d, "bad:v1"
		}, 2, []string{"encoder.safetensors", "enc.b", "shape [4]", "[5]"}},
		{"truncated safetensors", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			p := filepath.Join(d, "encoder.safetensors")
			b, _ := os.ReadFile(p)
			os.WriteFile(p, b[:len(b)-10], 0o644)
			return d, "bad:v1"
		}, 2, []string{"encoder.safetensors"}},
		{"overlapping safetensors", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			// dec.b is 13 floats = 52 bytes; a second tensor overlapping it.
			h := `{"dec.b":{"dtype":"F32","shape":[13],"data_offsets":[0,52]},"x":{"dtype":"F32","shape":[1],"data_offsets":[48,52]}}`
			os.WriteFile(filepath.Join(d, "decoder.safetensors"), rawSafetensors(h, make([]byte, 52)), 0o644)
			return d, "bad:v1"
		}, 2, []string{"decoder.safetensors", "overlap"}},
		{"NaN weight", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			vals := make([]float32, 13)
			vals[7] = float32(math.NaN())
			b, err := safetensors.Encode([]safetensors.Tensor{{Name: "dec.b", DType: "F32", Shape: []int{13}, Data: vals}}, nil)
			if err != nil {
				t.Fatal(err)
			}
			os.WriteFile(filepath.Join(d, "decoder.safetensors"), b, 0o644)
			return d, "bad:v1"
		}, 2, []string{"decoder.safetensors", "dec.b", "non-finite", "index 7"}},
		{"Inf weight in F16", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["tensors"].([]any)[2].(map[string]any)["dtype"] = "F16"
			})
			vals := make([]float32, 13)
			vals[2] = 1e6 // overflows F16 to +Inf
			b, err := safetensors.Encode([]safetensors.Tensor{{Name: "dec.b", DType: "F16", Shape: []int{13}, Data: vals}}, nil)
			if err != nil {
				t.Fatal(err)
			}
			os.WriteFile(filepath.Join(d, "decoder.safetensors"), b, 0o644)
			return d, "bad:v1"
		}, 2, []string{"decoder.safetensors", "non-finite", "index 2"}},
		{"missing vocabulary", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			os.Remove(filepath.Join(d, "vocabulary.txt"))
			return d, "bad:v1"
		}, 2, []string{"vocabulary.txt", "no such file"}},
		{"duplicate vocabulary id and wrong count", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			os.WriteFile(filepath.Join(d, "vocabulary.txt"), []byte("a\nb\na\n"), 0o644)
			return d, "bad:v1"
		}, 2, []string{"vocabulary.txt:3", "repeats line 1", "3 ids", "12"}},
		{"probe row lengths differ", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			os.WriteFile(filepath.Join(d, "probes.jsonl"), []byte(`{"items":["show-003","show-010"],"values":[1],"expect":{"code":[0,0,0,0]}}`+"\n"), 0o644)
			return d, "bad:v1"
		}, 2, []string{"probes.jsonl:1", "2 items but 1 values"}},
		{"layer input that does not exist", func(t *testing.T) (string, string) {
			d := copyDir(t, encDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["layers"].([]any)[1].(map[string]any)["input"] = "kode"
			})
			return d, "bad:v1"
		}, 2, []string{"spec.json", "kode"}},
		{"scorer's sparse input differs from its encoder's", func(t *testing.T) (string, string) {
			d := copyDir(t, scorerDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["inputs"].(map[string]any)["sparse"].([]any)[0].(map[string]any)["transform"] = "binary"
			})
			return d, "bad:v1"
		}, 2, []string{"spec.json", "transform"}},
		{"missing directory", func(t *testing.T) (string, string) {
			return filepath.Join(t.TempDir(), "nope"), "bad:v1"
		}, 2, []string{"nope"}},
		{"invalid repository name", func(t *testing.T) (string, string) { return encDir, "Listener_Encoder:v1" }, 2, []string{"invalid repository name", "Listener_Encoder"}},
		{"invalid tag", func(t *testing.T) (string, string) { return encDir, "listener-encoder:-v1" }, 2, []string{"invalid tag", "-v1"}},
		{"no tag", func(t *testing.T) (string, string) { return encDir, "listener-encoder" }, 2, []string{"NAME:TAG"}},
		{"scorer whose encoder is not in the store", func(t *testing.T) (string, string) {
			d := copyDir(t, scorerDir)
			editJSON(t, filepath.Join(d, "spec.json"), func(m map[string]any) {
				m["encoder"].(map[string]any)["digest"] = "sha256:" + strings.Repeat("ab", 32)
			})
			return d, "bad:v1"
		}, 2, []string{"not in the store", "push the encoder first"}},
	}
	before := listing(t, store)
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			dir, ref := c.setup(t)
			r := mg(t, store, "push", dir, ref)
			if r.code != c.code {
				t.Fatalf("exit %d, want %d\nstderr: %s", r.code, c.code, r.stderr)
			}
			for _, w := range c.want {
				if !strings.Contains(r.stderr, w) {
					t.Errorf("message lacks %q:\n%s", w, r.stderr)
				}
			}
			if r.stdout != "" {
				t.Errorf("stdout should be empty on failure, got %q", r.stdout)
			}
			if after := listing(t, store); after != before {
				t.Errorf("store changed after a refused push")
			}
			mustMG(t, store, "verify")
		})
	}
	// Usage errors.
	for _, args := range [][]string{{"push", encDir}, {"show"}, {"frobnicate"}, {"ls", "--nope"}, {"show", "x@sha256:12"}} {
		if r := mg(t, store, args...); r.code != 2 {
			t.Errorf("modelgate %v: exit %d, want 2 (%s)", args, r.code, r.stderr)
		}
	}
	if r := mg(t, store, "show", "tiny-encoder:nope"); r.code != 2 || !strings.Contains(r.stderr, "tiny-encoder:nope") {
		t.Errorf("show of a missing tag: exit %d, %s", r.code, r.stderr)
	}
}

// TestStoreDamageDetected flips one byte of a stored tensor blob: verify,
// show and pull must all refuse with exit 5, naming the blob.
func TestStoreDamageDetected(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, _ := fixtures(t)
	mustMG(t, store, "push", encDir, "tiny-encoder:v1")
	b, _ := os.ReadFile(filepath.Join(encDir, "encoder.safetensors"))
	d, err := modeldir.Read(encDir)
	if err != nil {
		t.Fatal(err)
	}
	var hex string
	for _, f := range d.TensorFiles {
		if f.Name == "encoder.safetensors" {
			hex = sha256Hex(f.Bytes)
		}
	}
	p := filepath.Join(store, "blobs", "sha256", hex)
	b[len(b)-1] ^= 0x01
	if err := os.WriteFile(p, b, 0o644); err != nil {
		t.Fatal(err)
	}
	r := mg(t, store, "verify")
	if r.code != 5 || !strings.Contains(r.stdout+r.stderr, hex) {
		t.Errorf("verify after damage: exit %d\n%s%s", r.code, r.stdout, r.stderr)
	}
	if r := mg(t, store, "pull", "tiny-encoder:v1", t.TempDir()); r.code != 5 {
		t.Errorf("pull of a damaged model: exit %d, want 5: %s", r.code, r.stderr)
	}
	if r := mg(t, store, "show", "tiny-encoder:v1"); r.code != 5 {
		t.Errorf("show of a damaged model: exit %d, want 5: %s", r.code, r.stderr)
	}
}

// variant writes an encoder whose name and weights differ by seed.
func variant(t *testing.T, root string, i int) string {
	t.Helper()
	m := fixture.EncoderModel()
	m.Spec.Name = "listener-encoder-" + string(rune('a'+i))
	w := m.Tensors["enc.b"]
	w[0] += float32(i)
	dir := filepath.Join(root, m.Spec.Name)
	if err := modeldir.Write(dir, m); err != nil {
		t.Fatal(err)
	}
	return dir
}

// TestConcurrentPushes: 16 processes push different models into one store
// at once; every model and tag is present afterwards and verify is clean.
func TestConcurrentPushes(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	root := t.TempDir()
	const n = 16
	dirs := make([]string, n)
	for i := range dirs {
		dirs[i] = variant(t, root, i)
	}
	var wg sync.WaitGroup
	results := make([]result, n)
	for i := 0; i < n; i++ {
		wg.Add(1)
		go func(i int) {
			defer wg.Done()
			repo := "listener-encoder"
			if i%2 == 1 {
				repo = "listener-encoder-odd"
			}
			results[i] = mg(t, store, "push", dirs[i], repo+":v"+string(rune('a'+i)))
		}(i)
	}
	wg.Wait()
	for i, r := range results {
		if r.code != 0 {
			t.Fatalf("push %d: exit %d: %s", i, r.code, r.stderr)
		}
	}
	var rows []lsRow
	if err := json.Unmarshal([]byte(mustMG(t, store, "ls", "--json").stdout), &rows); err != nil {
		t.Fatal(err)
	}
	if len(rows) != n {
		t.Fatalf("ls lists %d tags, want %d", len(rows), n)
	}
	for i, r := range results {
		found := false
		for _, row := range rows {
			if row.Digest == strings.TrimSpace(r.stdout) {
				found = true
			}
		}
		if !found {
			t.Errorf("push %d's digest %s is not tagged", i, r.stdout)
		}
	}
	mustMG(t, store, "verify")
}

// TestPushLinkInsideDirectory: a file of the model directory may be a
// symbolic link to another file inside it (an exporter's alias); the push
// stores the target's bytes, the same artifact as a plain copy. A model
// directory that is itself reached through a link is read as usual.
func TestPushLinkInsideDirectory(t *testing.T) {
	store := filepath.Join(t.TempDir(), "store")
	encDir, _ := fixtures(t)
	want := strings.TrimSpace(mustMG(t, store, "push", encDir, "tiny-encoder:plain").stdout)
	d := copyDir(t, encDir)
	if err := os.Rename(filepath.Join(d, "vocabulary.txt"), filepath.Join(d, "vocab-v7.txt")); err != nil {
		t.Fatal(err)
	}
	if err := os.Symlink("vocab-v7.txt", filepath.Join(d, "vocabulary.txt")); err != nil {
		t.Fatal(err)
	}
	alias := filepath.Join(t.TempDir(), "model-link")
	if err := os.Symlink(d, alias); err != nil {
		t.Fatal(err)
	}
	got := strings.TrimSpace(mustMG(t, store, "push", alias, "tiny-encoder:linked").stdout)
	if got != want {
		t.Fatalf("push through links stored %s, the plain directory %s", got, want)
	}
}

// TestReadOnlyStore: the reading commands (ls, show, log, verify, pull,
// diff) work on a store the user cannot write — one whose files are all
// read-only to a user who is not root (chmod -R a-w, the commands run as
// uid 65534 when the test runs as root, which file modes do not bind), and
// one on a read-only mount (a read-only bind mount; root only) — and
// leave it byte-identical. A write on the read-only mount fails, naming
// the file system, and changes nothing.
func TestReadOnlyStore(t *testing.T) {
	w := newReleaseWorld(t, 0)
	w.Push(0, "tiny-encoder:prod")
	w.Push(1, "")
	w.Gate("tiny-encoder:v1")
	mustMG(t, w.Store, "promote", "tiny-encoder:v1", "--to", "tiny-encoder:prod", "--policy", w.Policy, "--key", w.Key("rita"))
	w.Push(2, "")

	// A folder every user may enter, holding a copy of the binary and the
	// store (t.TempDir folders are private to the test's user).
	shared, err := os.MkdirTemp("", "modelgate-ro-")
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() {
		exec.Command("chmod", "-R", "u+w", shared).Run()
		os.RemoveAll(shared)
	})
	os.Chmod(shared, 0o755)
	bin := filepath.Join(shared, "modelgate")
	if out, err := exec.Command("cp", mgBinary, bin).CombinedOutput(); err != nil {
		t.Fatalf("cp: %v %s", err, out)
	}
	reads := func(store, out string) [][]string {
		return [][]string{
			{"ls"}, {"ls", "--json", "tiny-encoder"}, {"show", "tiny-encoder:prod"}, {"log", "tiny-encoder:prod"},
			{"verify"}, {"diff", "tiny-encoder:v1", "tiny-encoder:v2"}, {"pull", "tiny-encoder:prod", out},
		}
	}
	runIn := func(t *testing.T, store string, cred *syscall.Credential, args ...string) result {
		t.Helper()
		cmd := exec.Command(bin, args...)
		cmd.Env = append(os.Environ(), "MODELGATE_STORE="+store, "HOME="+shared)
		if cred != nil {
			cmd.SysProcAttr = &syscall.SysProcAttr{Credential: cred}
		}
		var so, se bytes.Buffer
		cmd.Stdout, cmd.Stderr = &so, &se
		err := cmd.Run()
		code := 0
		if ee, ok := err.(*exec.ExitError); ok {
			code = ee.ExitCode()
		} else if err != nil {
			t.Fatalf("running modelgate %v: %v", args, err)
		}
		return result{code, so.String(), se.String()}
	}

	t.Run("no write permission", func(t *testing.T) {
		store := filepath.Join(shared, "perm-store")
		if out, err := exec.Command("cp", "-a", w.Store, store).CombinedOutput(); err != nil {
			t.Fatalf("cp: %v %s", err, out)
		}
		if out, err := exec.Command("chmod", "-R", "a+rX,a-w", store).CombinedOutput(); err != nil {
			t.Fatalf("chmod: %v %s", err, out)
		}
		var cred *syscall.Credential
		if os.Geteuid() == 0 {
			cred = &syscall.Credential{Uid: 65534, Gid: 65534}
		}
		outDir := filepath.Join(shared, "pulled-perm")
		os.Mkdir(outDir, 0o777)
		os.Chmod(outDir, 0o777)
		before := listing(t, store)
		for _, args := range reads(store, filepath.Join(outDir, "m")) {
			if r := runIn(t, store, cred, args...); r.code != 0 {
				t.Errorf("modelgate %v on a store the user cannot write: exit %d\n%s%s", args, r.code, r.stdout, r.stderr)
			}
		}
		// A write is refused by the file system, and says so.
		r := runIn(t, store, cred, "push", nameVariant(t, shared, 7), "tiny-encoder:v7")
		if r.code == 0 || !strings.Contains(r.stderr, "permission denied") {
			t.Errorf("push to a store the user cannot write: exit %d\n%s", r.code, r.stderr)
		}
		if after := listing(t, store); after != before {
			t.Errorf("the store changed:\n%s", listingDiff(before, after))
		}
	})

	t.Run("read-only mount", func(t *testing.T) {
		if os.Geteuid() != 0 {
			t.Skip("a read-only bind mount needs root; the permission case above covers a user who cannot write")
		}
		mnt := filepath.Join(shared, "ro-mount")
		os.Mkdir(mnt, 0o755)
		if out, err := exec.Command("mount", "--bind", w.Store, mnt).CombinedOutput(); err != nil {
			t.Fatalf("mount --bind: %v %s", err, out)
		}
		t.Cleanup(func() { exec.Command("umount", mnt).Run() })
		if out, err := exec.Command("mount", "-o", "remount,bind,ro", mnt).CombinedOutput(); err != nil {
			t.Fatalf("mount -o remount,bind,ro: %v %s", err, out)
		}
		before := listing(t, mnt)
		for _, args := range reads(mnt, filepath.Join(t.TempDir(), "m")) {
			if r := runIn(t, mnt, nil, args...); r.code != 0 {
				t.Errorf("modelgate %v on a read-only mount: exit %d\n%s%s", args, r.code, r.stdout, r.stderr)
			}
		}
		r := runIn(t, mnt, nil, "push", nameVariant(t, t.TempDir(), 8), "tiny-encoder:v8")
		if r.code == 0 || !strings.Contains(r.stderr, "read-only file system") {
			t.Errorf("push to a read-only mount: exit %d\n%s", r.code, r.stderr)
		}
		if after := listing(t, mnt); after != before {
			t.Errorf("the store changed:\n%s", listingDiff(before, after))
		}
	})
}
