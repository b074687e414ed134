package schemas_test

import (
	"encoding/json"
	"reflect"
	"slices"
	"sort"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/internal/checks"
	"github.com/modelgate/modelgate/internal/report/reporttest"
	"github.com/modelgate/modelgate/schemas"
)

func validateReport(t *testing.T, r any) []schemas.Violation {
	t.Helper()
	doc, err := json.Marshal(r)
	if err != nil {
		t.Fatal(err)
	}
	vs, err := schemas.Validate(schemas.Report, doc)
	if err != nil {
		t.Fatal(err)
	}
	return vs
}

func TestReportSchemaAcceptsSamples(t *testing.T) {
	for name, r := range map[string]*checks.Report{
		"scorer":        reporttest.Scorer(),
		"failing":       reporttest.Failing(),
		"first release": reporttest.FirstRelease(),
		"encoder":       reporttest.Encoder(4),
		"hostile":       reporttest.Hostile(),
	} {
		t.Run(name, func(t *testing.T) {
			if vs := validateReport(t, r); len(vs) > 0 {
				t.Errorf("violations:\n%s", schemas.Join("  ", vs))
			}
		})
	}
}

// TestReportSchemaAcceptsUnloadable checks the report of a candidate and
// baseline that failed integrity: their kind is unknown, later checks skip.
func TestReportSchemaAcceptsUnloadable(t *testing.T) {
	r := reporttest.Failing()
	r.Candidate.Kind, r.Candidate.Name = "", ""
	r.Baseline.Kind, r.Baseline.Name = "", ""
	r.Checks[0].Status = checks.StatusFail
	for i := 1; i < len(r.Checks); i++ {
		r.Checks[i] = checks.CheckResult{Name: r.Checks[i].Name, Status: checks.StatusSkip, Summary: "not run: the candidate failed integrity", Findings: []checks.Finding{}}
	}
	if vs := validateReport(t, r); len(vs) > 0 {
		t.Errorf("violations:\n%s", schemas.Join("  ", vs))
	}
}

// TestReportSchemaAcceptsNilLists checks that lists Go writes as null when
// never filled are accepted.
func TestReportSchemaAcceptsNilLists(t *testing.T) {
	r := reporttest.Scorer()
	r.Reasons = nil
	for i := range r.Checks {
		r.Checks[i].Findings = nil
	}
	r.Checks[3].Holdout.Slices = nil
	r.Checks[3].Holdout.LossDiff.Counts = nil
	r.Checks[2].Contract.Items = nil
	r.Checks[4].Budget.Items = nil
	if vs := validateReport(t, r); len(vs) > 0 {
		t.Errorf("violations:\n%s", schemas.Join("  ", vs))
	}
}

func TestReportSchemaRejects(t *testing.T) {
	cases := []struct {
		name   string
		mutate func(r *checks.Report)
		want   string // pointer of one expected violation
	}{
		{"short digest", func(r *checks.Report) { r.Candidate.Digest = "sha256:abc" }, "/candidate/digest"},
		{"upper-case digest", func(r *checks.Report) { r.Policy.Digest = strings.ToUpper(r.Policy.Digest) }, "/policy/digest"},
		{"unknown status", func(r *checks.Report) { r.Checks[0].Status = "OK" }, "/checks/0/status"},
		{"unknown verdict", func(r *checks.Report) { r.Verdict = "maybe" }, "/verdict"},
		{"fail without reasons", func(r *checks.Report) { r.Verdict = checks.VerdictFail; r.Reasons = nil }, "/reasons"},
		{"pass with a failing check", func(r *checks.Report) { r.Checks[4].Status = checks.StatusFail }, "/checks/4/status"},
		{"unknown check", func(r *checks.Report) { r.Checks[1].Name = "vibes" }, "/checks/1/name"},
		{"detail on the wrong check", func(r *checks.Report) { r.Checks[0].Budget = r.Checks[4].Budget }, "/checks/0/name"},
		{"holdout of the wrong kind", func(r *checks.Report) { r.Holdout.Kind = "scorer" }, "/holdout"},
		{"local time", func(r *checks.Report) { r.Created = "2026-03-14T10:26:53+01:00" }, "/created"},
		{"target without tag", func(r *checks.Report) { r.Target = "promo-scorer" }, "/target"},
		{"target with upper-case repository", func(r *checks.Report) { r.Target = "Promo-Scorer:prod" }, "/target"},
		{"unknown subject kind", func(r *checks.Report) { r.Candidate.Kind = "report" }, "/candidate/kind"},
		{"AUC above one", func(r *checks.Report) { r.Checks[3].Holdout.Candidate.AUC = 1.2 }, "/checks/3/holdout/candidate/auc"},
		{"calibration bin outside [0,1]", func(r *checks.Report) { r.Checks[3].Holdout.CalibrationCandidate[2].Observed = -0.1 }, "/checks/3/holdout/calibrationCandidate/2/observed"},
		{"negative histogram count", func(r *checks.Report) { r.Checks[3].Holdout.LossDiff.Counts[0] = -1 }, "/checks/3/holdout/lossDiff/counts/0"},
		{"schema version", func(r *checks.Report) { r.SchemaVersion = 2 }, "/schemaVersion"},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			r := reporttest.Scorer()
			c.mutate(r)
			vs := validateReport(t, r)
			if len(vs) == 0 {
				t.Fatal("no violation")
			}
			var at []string
			for _, v := range vs {
				at = append(at, v.Pointer)
			}
			if !slices.Contains(at, c.want) {
				t.Errorf("no violation at %s; got:\n%s", c.want, schemas.Join("  ", vs))
			}
		})
	}
	t.Run("extra field", func(t *testing.T) {
		doc, _ := json.Marshal(reporttest.Scorer())
		var m map[string]any
		if err := json.Unmarshal(doc, &m); err != nil {
			t.Fatal(err)
		}
		m["signedBy"] = "nobody"
		delete(m, "policy")
		doc, _ = json.Marshal(m)
		vs, err := schemas.Validate(schemas.Report, doc)
		if err != nil {
			t.Fatal(err)
		}
		if len(vs) < 2 {
			t.Errorf("want violations for the extra and the missing field, got:\n%s", schemas.Join("  ", vs))
		}
	})
}

// TestReportSchemaMatchesTypes keeps the schema and the Go types in step:
// for every struct type reachable from checks.Report, the $defs entry of
// the same name lists exactly the type's JSON fields, requires exactly the
// ones without omitempty, and forbids any other.
func TestReportSchemaMatchesTypes(t *testing.T) {
	raw, err := schemas.Raw(schemas.Report)
	if err != nil {
		t.Fatal(err)
	}
	var sch struct {
		Defs map[string]struct {
			Properties           map[string]json.RawMessage `json:"properties"`
			Required             []string                   `json:"required"`
			AdditionalProperties *bool                      `json:"additionalProperties"`
		} `json:"$defs"`
	}
	if err := json.Unmarshal(raw, &sch); err != nil {
		t.Fatal(err)
	}
	seen := map[reflect.Type]bool{}
	var walk func(ty reflect.Type)
	walk = func(ty reflect.Type) {
		for ty.Kind() == reflect.Pointer || ty.Kind() == reflect.Slice {
			ty = ty.Elem()
		}
		if ty.Kind() != reflect.Struct || seen[ty] {
			return
		}
		seen[ty] = true
		def, ok := sch.Defs[ty.Name()]
		if !ok {
			t.Errorf("schema has no $defs/%s", ty.Name())
			return
		}
		if def.AdditionalProperties == nil || *def.AdditionalProperties {
			t.Errorf("$defs/%s allows additional properties", ty.Name())
		}
		var fields, required []string
		for i := range ty.NumField() {
			fl := ty.Field(i)
			name, opts, _ := strings.Cut(fl.Tag.Get("json"), ",")
			if name == "-" || !fl.IsExported() {
				continue
			}
			fields = append(fields, name)
			if !strings.Contains(opts, "omitempty") {
				required = append(required, name)
			}
			walk(fl.Type)
		}
		var props []string
		for p := range def.Properties {
			props = append(props, p)
		}
		sort.Strings(fields)
		sort.Strings(required)
		sort.Strings(props)
		req := slices.Clone(def.Required)
		sort.Strings(req)
		if !slices.Equal(fields, props) {
			t.Errorf("$defs/%s properties %v, Go fields %v", ty.Name(), props, fields)
		}
		if !slices.Equal(required, req) {
			t.Errorf("$defs/%s requires %v, Go fields without omitempty %v", ty.Name(), req, required)
		}
	}
	walk(reflect.TypeFor[checks.Report]())
	if len(seen) < 10 {
		t.Errorf("walked only %d types", len(seen))
	}
}

// TestDuplicateKeys: a key given twice in one object is named by its JSON
// pointer (RFC 6901 escaping), in nested objects and arrays too; the same
// key in two different objects is fine.
func TestDuplicateKeys(t *testing.T) {
	doc := `{"kind":"encoder","a":[{"x":1},{"x":2,"x":3}],"b/c":{"~":1,"~":2},"kind":"scorer"}`
	got := schemas.DuplicateKeys([]byte(doc))
	want := []string{`/a/1/x: key "x" given twice in one object`, `/b~1c/~0: key "~" given twice in one object`, `/kind: key "kind" given twice in one object`}
	if len(got) != len(want) {
		t.Fatalf("got %v, want %v", got, want)
	}
	for i := range want {
		if got[i].String() != want[i] {
			t.Errorf("violation %d: %s, want %s", i, got[i], want[i])
		}
	}
	if d := schemas.DuplicateKeys([]byte(`{"a":{"k":1},"b":{"k":1}}`)); len(d) != 0 {
		t.Errorf("keys in different objects reported: %v", d)
	}
}
