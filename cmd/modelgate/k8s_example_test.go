package main

import (
	"bytes"
	"io"
	"os"
	"path"
	"path/filepath"
	"regexp"
	"strconv"
	"strings"
	"testing"
	"time"

	batchv1 "k8s.io/api/batch/v1"
	corev1 "k8s.io/api/core/v1"
	metav1 "k8s.io/apimachinery/pkg/apis/meta/v1"
	"sigs.k8s.io/yaml"

	"github.com/modelgate/modelgate/internal/policy"
)

var pinnedDigest = regexp.MustCompile(`@sha256:[0-9a-f]{64}$`)

// TestKubernetesExample reads examples/gate-shards-job.yaml as Kubernetes
// would: every document decoded strictly (unknown or duplicate fields
// refused) into the published API types of k8s.io/api (batch/v1 Job,
// v1 ConfigMap, v1 Secret), then checks what the example promises: images
// and the candidate pinned by digest, shards as an Indexed Job whose index
// reaches --shard-index, a merge that waits for them and signs with a key
// mounted from a Secret, a policy ConfigMap that parses with its keys
// inline, and container args that modelgate's own flag parser accepts.
func TestKubernetesExample(t *testing.T) {
	raw, err := os.ReadFile(filepath.Join("..", "..", "examples", "gate-shards-job.yaml"))
	if err != nil {
		t.Fatal(err)
	}
	var jobs []*batchv1.Job
	for i, doc := range splitYAML(raw) {
		var tm metav1.TypeMeta
		if err := yaml.Unmarshal(doc, &tm); err != nil {
			t.Fatalf("document %d: %v", i, err)
		}
		var obj any
		switch tm.APIVersion + " " + tm.Kind {
		case "batch/v1 Job":
			j := &batchv1.Job{}
			jobs, obj = append(jobs, j), j
		case "v1 ConfigMap":
			obj = &corev1.ConfigMap{}
		case "v1 Secret":
			obj = &corev1.Secret{}
		default:
			t.Fatalf("document %d: unexpected %s %s", i, tm.APIVersion, tm.Kind)
		}
		if err := yaml.UnmarshalStrict(doc, obj); err != nil {
			t.Fatalf("document %d (%s): %v", i, tm.Kind, err)
		}
	}
	configMaps, secrets := collect(t, raw)
	if len(jobs) != 2 {
		t.Fatalf("%d Jobs, want the shards and the merge", len(jobs))
	}
	shards, merge := jobs[0], jobs[1]
	sc, mc := onlyContainer(t, shards), onlyContainer(t, merge)

	// Images and the candidate pinned by digest, the same in both Jobs.
	for _, c := range []corev1.Container{sc, mc} {
		if !pinnedDigest.MatchString(c.Image) {
			t.Errorf("%s: image %q is not pinned by digest", c.Name, c.Image)
		}
		if len(c.Args) < 2 || c.Args[0] != "gate" || !pinnedDigest.MatchString(c.Args[1]) {
			t.Errorf("%s: args %q: want gate NAME@sha256:…", c.Name, c.Args)
		}
	}
	if sc.Image != mc.Image || sc.Args[1] != mc.Args[1] {
		t.Errorf("shards and merge differ: %s %s vs %s %s", sc.Image, sc.Args[1], mc.Image, mc.Args[1])
	}

	// Shards: an Indexed Job whose index goes to --shard-index K/N with N
	// its completions.
	if shards.Spec.CompletionMode == nil || *shards.Spec.CompletionMode != batchv1.IndexedCompletion || shards.Spec.Completions == nil {
		t.Fatalf("shard Job: completionMode %v, completions %v; want Indexed", shards.Spec.CompletionMode, shards.Spec.Completions)
	}
	n := int(*shards.Spec.Completions)
	ix := flagValue(t, sc.Args, "--shard-index")
	if ix != "$(JOB_COMPLETION_INDEX)/"+strconv.Itoa(n) {
		t.Errorf("--shard-index %q, want $(JOB_COMPLETION_INDEX)/%d", ix, n)
	}
	for k := 0; k < n; k++ { // Kubernetes expands $(VAR) in args from the container's env
		expanded := strings.ReplaceAll(strings.Join(sc.Args, "\x00"), "$(JOB_COMPLETION_INDEX)", strconv.Itoa(k))
		parseArgs(t, strings.Split(expanded, "\x00"))
	}

	// Merge: waits, signs with the CI key from a Secret volume.
	if !hasArg(mc.Args, "--merge") {
		t.Errorf("merge args %q lack --merge", mc.Args)
	}
	if d, err := time.ParseDuration(flagValue(t, mc.Args, "--wait")); err != nil || d <= 0 {
		t.Errorf("merge --wait: %v %v", d, err)
	} else if ads := merge.Spec.ActiveDeadlineSeconds; ads == nil || time.Duration(*ads)*time.Second <= d {
		t.Errorf("merge activeDeadlineSeconds %v must outlast --wait %s", ads, d)
	}
	parseArgs(t, mc.Args)
	keyPath, ok := strings.CutPrefix(flagValue(t, mc.Args, "--sign-key"), "file:")
	if !ok {
		t.Fatalf("merge --sign-key %q: want file:PATH", flagValue(t, mc.Args, "--sign-key"))
	}
	vol := mountedVolume(t, merge, mc, keyPath)
	if vol.Secret == nil {
		t.Fatalf("the signing key %s is not on a Secret volume: %+v", keyPath, vol)
	}
	if s, ok := secrets[vol.Secret.SecretName]; !ok {
		t.Errorf("Secret %q is not in the example", vol.Secret.SecretName)
	} else if _, ok := s.StringData[path.Base(keyPath)]; !ok {
		t.Errorf("Secret %q has no key %q", s.Name, path.Base(keyPath))
	}
	for _, m := range sc.VolumeMounts {
		for _, v := range shards.Spec.Template.Spec.Volumes {
			if v.Name == m.Name && v.Secret != nil {
				t.Errorf("shard pods mount Secret %s: only the merge signs", v.Secret.SecretName)
			}
		}
	}

	// Both run as non-root; the policy comes from the ConfigMap and holds
	// its keys inline: parsed where no key file exists.
	for _, j := range jobs {
		psc := j.Spec.Template.Spec.SecurityContext
		if psc == nil || psc.RunAsNonRoot == nil || !*psc.RunAsNonRoot {
			t.Errorf("%s: pod not runAsNonRoot", j.Name)
		}
		c := onlyContainer(t, j)
		pp := flagValue(t, c.Args, "--policy")
		v := mountedVolume(t, j, c, pp)
		if v.ConfigMap == nil {
			t.Fatalf("%s: --policy %s is not on a ConfigMap volume", j.Name, pp)
		}
		cm, ok := configMaps[v.ConfigMap.Name]
		if !ok {
			t.Fatalf("%s: ConfigMap %q is not in the example", j.Name, v.ConfigMap.Name)
		}
		doc, ok := cm.Data[path.Base(pp)]
		if !ok {
			t.Fatalf("ConfigMap %s has no %s", cm.Name, path.Base(pp))
		}
		pol, err := policy.Parse(filepath.Join(t.TempDir(), path.Base(pp)), []byte(doc))
		if err != nil {
			t.Fatalf("the ConfigMap's policy: %v", err)
		}
		rule, err := pol.Rule(flagValue(t, c.Args, "--to"))
		if err != nil {
			t.Fatal(err)
		}
		for _, k := range append(append([]policy.Key{}, rule.Approvals.Approvers...), rule.Approvals.ReportSigners...) {
			if k.KeyFile != "" || k.PublicKey == nil {
				t.Errorf("policy key %s: want it inline (keyFile %q)", k.Name, k.KeyFile)
			}
		}
		if len(rule.Approvals.ReportSigners) == 0 {
			t.Error("the policy lists no report signer for the merge's key")
		}
	}
}

// splitYAML splits a multi-document YAML stream on its "---" lines.
func splitYAML(raw []byte) [][]byte {
	var docs [][]byte
	for _, d := range regexp.MustCompile(`(?m)^---\s*$`).Split(string(raw), -1) {
		if strings.TrimSpace(regexp.MustCompile(`(?m)^\s*#.*$`).ReplaceAllString(d, "")) != "" {
			docs = append(docs, []byte(d))
		}
	}
	return docs
}

// collect decodes the ConfigMaps and Secrets by name.
func collect(t *testing.T, raw []byte) (map[string]*corev1.ConfigMap, map[string]*corev1.Secret) {
	cms, ss := map[string]*corev1.ConfigMap{}, map[string]*corev1.Secret{}
	for _, doc := range splitYAML(raw) {
		var tm metav1.TypeMeta
		if err := yaml.Unmarshal(doc, &tm); err != nil {
			t.Fatal(err)
		}
		switch tm.Kind {
		case "ConfigMap":
			c := &corev1.ConfigMap{}
			if err := yaml.UnmarshalStrict(doc, c); err != nil {
				t.Fatal(err)
			}
			cms[c.Name] = c
		case "Secret":
			s := &corev1.Secret{}
			if err := yaml.UnmarshalStrict(doc, s); err != nil {
				t.Fatal(err)
			}
			ss[s.Name] = s
		}
	}
	return cms, ss
}

func onlyContainer(t *testing.T, j *batchv1.Job) corev1.Container {
	t.Helper()
	cs := j.Spec.Template.Spec.Containers
	if len(cs) != 1 {
		t.Fatalf("%s: %d containers, want 1", j.Name, len(cs))
	}
	return cs[0]
}

func hasArg(args []string, a string) bool {
	for _, x := range args {
		if x == a {
			return true
		}
	}
	return false
}

func flagValue(t *testing.T, args []string, name string) string {
	t.Helper()
	for i, a := range args {
		if a == name && i+1 < len(args) {
			return args[i+1]
		}
	}
	t.Fatalf("args %q: no %s", args, name)
	return ""
}

// mountedVolume returns the pod volume mounted where file p lives.
func mountedVolume(t *testing.T, j *batchv1.Job, c corev1.Container, p string) corev1.Volume {
	t.Helper()
	for _, m := range c.VolumeMounts {
		if path.Dir(p) == path.Clean(m.MountPath) {
			for _, v := range j.Spec.Template.Spec.Volumes {
				if v.Name == m.Name {
					return v
				}
			}
		}
	}
	t.Fatalf("%s: no volume mounted at %s", j.Name, path.Dir(p))
	return corev1.Volume{}
}

// parseArgs runs the container's args through modelgate's own command
// tree and flag parser (no command runs).
func parseArgs(t *testing.T, args []string) {
	t.Helper()
	g := &globals{Stdout: io.Discard, Stderr: io.Discard, Stdin: bytes.NewReader(nil)}
	root := newRoot(g)
	cmd, rest, err := root.Find(args)
	if err != nil {
		t.Fatalf("args %q: %v", args, err)
	}
	if err := cmd.ParseFlags(rest); err != nil {
		t.Fatalf("args %q: %v", args, err)
	}
	if err := cmd.ValidateArgs(cmd.Flags().Args()); err != nil {
		t.Fatalf("args %q: %v", args, err)
	}
}
