// Package schemas embeds modelgate's JSON Schemas and compiles them.
package schemas

import (
	"bytes"
	"embed"
	"encoding/json"
	"fmt"
	"sort"
	"strings"
	"sync"

	"github.com/santhosh-tekuri/jsonschema/v5"
)

//go:embed *.schema.json
var files embed.FS

// Names of the embedded schemas.
const (
	Spec   = "spec.schema.json"
	Policy = "policy.schema.json"
	Report = "report.schema.json"
)

// Output names the schema of a command's --json output on stdout
// ("output-push.schema.json" for push). Every command that ends prints
// one document: its result, or on failure {"error": …}
// (output-error.schema.json) — beside the result when it has one.
func Output(command string) string { return "output-" + command + ".schema.json" }

// OutputCommands are the commands whose --json output has a schema.
var OutputCommands = []string{"approve", "copy", "demo", "diff", "freeze", "gate", "keygen", "log", "ls", "policy", "promote", "pull", "push", "reclaim", "rollback", "score", "show", "untag", "verify"}

var (
	mu       sync.Mutex
	compiled = map[string]*jsonschema.Schema{}
)

// Raw returns the bytes of the named embedded schema.
func Raw(name string) ([]byte, error) { return files.ReadFile(name) }

func get(name string) (*jsonschema.Schema, error) {
	mu.Lock()
	defer mu.Unlock()
	if s, ok := compiled[name]; ok {
		return s, nil
	}
	if _, err := files.ReadFile(name); err != nil {
		return nil, fmt.Errorf("schema %q: %w", name, err)
	}
	// Every schema is a resource under its $id, so that one may refer to
	// another by a relative reference ("report.schema.json").
	c := jsonschema.NewCompiler()
	c.Draft = jsonschema.Draft2020
	all, err := files.ReadDir(".")
	if err != nil {
		return nil, err
	}
	url := ""
	for _, f := range all {
		raw, err := files.ReadFile(f.Name())
		if err != nil {
			return nil, err
		}
		var head struct {
			ID string `json:"$id"`
		}
		_ = json.Unmarshal(raw, &head)
		u := head.ID
		if u == "" {
			u = "mem:///" + f.Name()
		}
		if err := c.AddResource(u, bytes.NewReader(raw)); err != nil {
			return nil, fmt.Errorf("schema %q: %w", f.Name(), err)
		}
		if f.Name() == name {
			url = u
		}
	}
	s, err := c.Compile(url)
	if err != nil {
		return nil, fmt.Errorf("compiling schema %q: %w", name, err)
	}
	compiled[name] = s
	return s, nil
}

// Violation is one place where a document breaks a schema.
type Violation struct {
	// Pointer is the JSON pointer of the offending value ("" is the root).
	Pointer string `json:"pointer"`
	Message string `json:"message"`
}

func (v Violation) String() string {
	p := v.Pointer
	if p == "" {
		p = "/"
	}
	return p + ": " + v.Message
}

// Validate checks doc (raw JSON) against the named schema and returns every
// violation, sorted by pointer. A document that is not JSON gives one
// violation at the root. err is non-nil only when the schema itself fails.
func Validate(name string, doc []byte) ([]Violation, error) {
	s, err := get(name)
	if err != nil {
		return nil, err
	}
	dec := json.NewDecoder(bytes.NewReader(doc))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return []Violation{{Pointer: "", Message: "not valid JSON: " + err.Error()}}, nil
	}
	if dec.More() {
		return []Violation{{Pointer: "", Message: "not valid JSON: data after the top-level value"}}, nil
	}
	if dups := DuplicateKeys(doc); len(dups) > 0 {
		// Which of the two values counts is up to each reader: refuse the
		// document rather than validate one reading of it.
		return dups, nil
	}
	err = s.Validate(v)
	if err == nil {
		return nil, nil
	}
	ve, ok := err.(*jsonschema.ValidationError)
	if !ok {
		return nil, err
	}
	var out []Violation
	seen := map[string]bool{}
	var walk func(e *jsonschema.ValidationError)
	walk = func(e *jsonschema.ValidationError) {
		if len(e.Causes) == 0 {
			v := Violation{Pointer: e.InstanceLocation, Message: plainMessage(e.Message)}
			if k := v.String(); !seen[k] {
				seen[k] = true
				out = append(out, v)
			}
			return
		}
		for _, c := range e.Causes {
			walk(c)
		}
	}
	walk(ve)
	sort.SliceStable(out, func(i, j int) bool { return out[i].Pointer < out[j].Pointer })
	return out, nil
}

// Join renders violations one per line, each prefixed by prefix.
func Join(prefix string, vs []Violation) string {
	var b strings.Builder
	for i, v := range vs {
		if i > 0 {
			b.WriteByte('\n')
		}
		b.WriteString(prefix)
		b.WriteString(v.String())
	}
	return b.String()
}

// DuplicateKeys returns a violation for every object member of doc (valid
// JSON) whose key the same object already has, at the JSON pointer of the
// repeated member.
func DuplicateKeys(doc []byte) []Violation {
	dec := json.NewDecoder(bytes.NewReader(doc))
	dec.UseNumber()
	var out []Violation
	var walk func(ptr string) error
	walk = func(ptr string) error {
		tok, err := dec.Token()
		if err != nil {
			return err
		}
		d, ok := tok.(json.Delim)
		if !ok {
			return nil
		}
		switch d {
		case '{':
			seen := map[string]bool{}
			for dec.More() {
				kt, err := dec.Token()
				if err != nil {
					return err
				}
				k, _ := kt.(string)
				child := ptr + "/" + escapePointer(k)
				if seen[k] {
					out = append(out, Violation{Pointer: child, Message: fmt.Sprintf("key %q given twice in one object", k)})
				}
				seen[k] = true
				if err := walk(child); err != nil {
					return err
				}
			}
		case '[':
			for i := 0; dec.More(); i++ {
				if err := walk(fmt.Sprintf("%s/%d", ptr, i)); err != nil {
					return err
				}
			}
		}
		_, err = dec.Token() // the closing delimiter
		return err
	}
	if err := walk(""); err != nil {
		return nil
	}
	return out
}

// escapePointer escapes a key for a JSON pointer (RFC 6901: ~ as ~0, / as ~1).
func escapePointer(k string) string {
	return strings.ReplaceAll(strings.ReplaceAll(k, "~", "~0"), "/", "~1")
}

// patternNames says in words what the schemas' patterns accept, so that a
// violation names the expected form rather than a regular expression.
var patternNames = map[string]string{
	`^[0-9]{4}-[0-9]{2}-[0-9]{2}[Tt][0-9]{2}:[0-9]{2}:[0-9]{2}(\.[0-9]+)?([Zz]|[+-][0-9]{2}:[0-9]{2})$`: "an RFC 3339 date-time such as 2026-03-01T12:00:00Z or 2026-03-01T12:00:00+00:00",
	`^[0-9a-f]{7,64}$`: "a commit id: 7 to 64 lower-case hex digits",
}

func plainMessage(msg string) string {
	const prefix = "does not match pattern "
	if p, ok := strings.CutPrefix(msg, prefix); ok {
		p = strings.ReplaceAll(strings.TrimSuffix(strings.TrimPrefix(p, "'"), "'"), `\\`, `\`)
		if name, ok := patternNames[p]; ok {
			return "is not " + name
		}
	}
	return msg
}
