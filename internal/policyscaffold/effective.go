// Package policyscaffold writes a starting policy for a target tag from
// what the store holds (Draft), and checks a policy against the store
// without gating (Check): schema and keys, the holdout present and
// labelled, tags that exist, thresholds that make sense together, and
// every setting's effective value beside the default it replaces.
package policyscaffold

import (
	"encoding/json"
	"fmt"
	"path/filepath"
	"sort"
	"strings"

	"sigs.k8s.io/yaml"

	"github.com/modelgate/modelgate/schemas"
)

// Setting is one leaf property of a rule: its path in the policy (from
// the rule, e.g. checks.holdout.margin), the value in force and where it
// comes from.
type Setting struct {
	Path string `json:"path"`
	// Value is the policy's value, else the schema's default; nil when
	// neither gives one (the setting is off or measured only).
	Value any `json:"value"`
	// Source is "policy", "default" or "unset".
	Source string `json:"source"`
	// Default is the schema's default, nil when it has none.
	Default any `json:"default,omitempty"`
}

// policyJSON turns the policy file's bytes into a generic JSON document.
func policyJSON(name string, raw []byte) (map[string]any, error) {
	b := raw
	if ext := strings.ToLower(filepath.Ext(name)); ext == ".yaml" || ext == ".yml" {
		var err error
		if b, err = yaml.YAMLToJSON(raw); err != nil {
			return nil, err
		}
	}
	var doc map[string]any
	dec := json.NewDecoder(strings.NewReader(string(b)))
	dec.UseNumber()
	if err := dec.Decode(&doc); err != nil {
		return nil, err
	}
	return doc, nil
}

type schemaDoc struct {
	defs map[string]any
}

func loadSchema() (*schemaDoc, error) {
	raw, err := schemas.Raw("policy.schema.json")
	if err != nil {
		return nil, err
	}
	var s map[string]any
	if err := json.Unmarshal(raw, &s); err != nil {
		return nil, err
	}
	defs, _ := s["$defs"].(map[string]any)
	return &schemaDoc{defs: defs}, nil
}

// deref follows a local "$ref" (#/$defs/NAME), merging the referring
// node's own keys (description, default) over the target's.
func (s *schemaDoc) deref(node map[string]any) map[string]any {
	for i := 0; i < 8; i++ {
		ref, ok := node["$ref"].(string)
		if !ok || !strings.HasPrefix(ref, "#/$defs/") {
			return node
		}
		target, _ := s.defs[strings.TrimPrefix(ref, "#/$defs/")].(map[string]any)
		merged := map[string]any{}
		for k, v := range target {
			merged[k] = v
		}
		for k, v := range node {
			if k != "$ref" {
				merged[k] = v
			}
		}
		node = merged
	}
	return node
}

// Effective lists every leaf setting of the rule (as the policy file gives
// it: rule is the rule's JSON object) for a model kind, each with the
// value in force: the policy's own, else the schema's documented default.
func Effective(rule map[string]any, kind string) ([]Setting, error) {
	s, err := loadSchema()
	if err != nil {
		return nil, err
	}
	root, _ := s.defs["rule"].(map[string]any)
	props, _ := root["properties"].(map[string]any)
	checksDef := "scorerChecks"
	if kind == "encoder" {
		checksDef = "encoderChecks"
	}
	var out []Setting
	// parentDefault is the enclosing object's documented default (e.g. a
	// tolerance {abs, rel}), which gives its members' defaults.
	var walk func(prefix string, props map[string]any, doc map[string]any, parentDefault map[string]any)
	walk = func(prefix string, props map[string]any, doc map[string]any, parentDefault map[string]any) {
		names := make([]string, 0, len(props))
		for k := range props {
			names = append(names, k)
		}
		sort.Strings(names)
		for _, name := range names {
			node, _ := props[name].(map[string]any)
			if prefix == "" && name == "checks" {
				node = map[string]any{"$ref": "#/$defs/" + checksDef}
			}
			node = s.deref(node)
			path := strings.TrimPrefix(prefix+"."+name, ".")
			val, present := doc[name]
			def := node["default"]
			if def == nil && parentDefault != nil {
				def = parentDefault[name]
			}
			if def == nil {
				def = describedDefault(node)
			}
			if sub, ok := node["properties"].(map[string]any); ok && node["type"] == "object" && !allRequired(node, sub) {
				d, _ := val.(map[string]any)
				pd, _ := def.(map[string]any)
				walk(path, sub, d, pd)
				continue
			}
			st := Setting{Path: path, Default: def}
			switch {
			case present:
				st.Value, st.Source = val, "policy"
			case def != nil:
				st.Value, st.Source = def, "default"
			default:
				st.Source = "unset"
			}
			out = append(out, st)
		}
	}
	walk("", props, rule, nil)
	return out, nil
}

// FormatValue renders a setting's value for a terminal line.
func FormatValue(v any) string {
	if v == nil {
		return "-"
	}
	switch x := v.(type) {
	case string:
		return x
	case []any:
		if len(x) > 0 {
			if _, obj := x[0].(map[string]any); obj {
				if len(x) == 1 {
					return "1 entry"
				}
				return fmt.Sprintf("%d entries", len(x))
			}
		}
	}
	b, err := json.Marshal(v)
	if err != nil {
		return fmt.Sprint(v)
	}
	return string(b)
}

// allRequired reports whether an object's members are all required: such
// an object (a tolerance {abs, rel}) is one setting.
func allRequired(node, props map[string]any) bool {
	req, _ := node["required"].([]any)
	return len(req) > 0 && len(req) == len(props)
}

// describedDefault is the default a schema property states in its
// description only ("... Default {abs: 1e-5, rel: 1e-4}."), as text; nil
// when it states none.
func describedDefault(node map[string]any) any {
	d, _ := node["description"].(string)
	i := strings.LastIndex(strings.ToLower(d), "default ")
	if j := strings.LastIndex(strings.ToLower(d), "default: "); j > i {
		i = j + 1
	}
	if i < 0 {
		return nil
	}
	rest := strings.TrimSpace(d[i+len("default "):])
	if j := strings.Index(rest, ". "); j >= 0 {
		rest = rest[:j]
	}
	rest = strings.TrimSuffix(rest, ".")
	if k := strings.IndexAny(rest, ";("); k > 0 {
		rest = strings.TrimSpace(rest[:k])
	}
	return rest
}
