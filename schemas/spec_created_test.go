package schemas_test

import (
	"encoding/json"
	"os"
	"strings"
	"testing"

	"github.com/modelgate/modelgate/schemas"
)

// TestSpecCreatedRFC3339: lineage.created takes every RFC 3339 date-time
// form (RFC 3339 §5.6: "Z" or a numeric offset; "T" and "Z" in either
// case), including Python's datetime.isoformat() output with +00:00, and a
// refusal names the expected form, not a regular expression.
func TestSpecCreatedRFC3339(t *testing.T) {
	raw, err := os.ReadFile("../testdata/models/tiny-encoder/spec.json")
	if err != nil {
		t.Fatal(err)
	}
	with := func(created string) []schemas.Violation {
		var spec map[string]any
		if err := json.Unmarshal(raw, &spec); err != nil {
			t.Fatal(err)
		}
		lin, _ := spec["lineage"].(map[string]any)
		if lin == nil {
			lin = map[string]any{}
			spec["lineage"] = lin
		}
		lin["created"] = created
		doc, _ := json.Marshal(spec)
		vs, err := schemas.Validate(schemas.Spec, doc)
		if err != nil {
			t.Fatal(err)
		}
		return vs
	}
	for _, ok := range []string{"2026-03-01T12:00:00Z", "2026-03-01T12:00:00.123456+00:00", "2026-03-01T12:00:00-05:30", "2026-03-01t12:00:00z"} {
		if vs := with(ok); len(vs) > 0 {
			t.Errorf("created %q refused: %v", ok, vs)
		}
	}
	for _, bad := range []string{"2026-03-01 12:00:00", "2026-03-01T12:00:00", "2026-03-01T12:00:00+0000"} {
		vs := with(bad)
		if len(vs) != 1 || vs[0].Pointer != "/lineage/created" || !strings.Contains(vs[0].Message, "RFC 3339 date-time") || strings.Contains(vs[0].Message, "^") {
			t.Errorf("created %q: violations %v; want one at /lineage/created naming RFC 3339", bad, vs)
		}
	}
}
