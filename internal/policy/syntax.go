package policy

import (
	"bytes"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"path/filepath"
	"strconv"
	"strings"

	yamlv2 "go.yaml.in/yaml/v2"
	"sigs.k8s.io/yaml"
)

// maxDepth bounds the nesting of a policy document; the schema needs six
// levels.
const maxDepth = 64

// isJSON decides the format of a policy file from its name, then its
// first non-space byte.
func isJSON(name string, raw []byte) bool {
	switch strings.ToLower(filepath.Ext(name)) {
	case ".json":
		return true
	case ".yaml", ".yml":
		return false
	}
	t := bytes.TrimLeft(raw, " \t\r\n")
	return len(t) > 0 && t[0] == '{'
}

// toJSON turns raw into one JSON document, or adds the syntax problem to
// probs and returns false.
func toJSON(name string, raw []byte, probs *Problems) ([]byte, bool) {
	if isJSON(name, raw) {
		if msg := checkJSON(raw); msg != "" {
			probs.add("", "not valid JSON: %s", msg)
			return nil, false
		}
		return raw, true
	}
	// One document only: a second one would be silently ignored by the
	// converter, and a reader of the file could believe it applies.
	dec := yamlv2.NewDecoder(bytes.NewReader(raw))
	var first, second any
	if err := dec.Decode(&first); err != nil && err != io.EOF {
		probs.add("", "not valid YAML: %s", yamlMessage(err))
		return nil, false
	}
	if err := dec.Decode(&second); err != io.EOF {
		if err != nil {
			probs.add("", "not valid YAML: %s", yamlMessage(err))
		} else {
			probs.add("", "not valid YAML: the file holds more than one YAML document (---); a policy is one document")
		}
		return nil, false
	}
	// Strict: a key repeated in a mapping is an error, not "last wins".
	doc, err := yaml.YAMLToJSONStrict(raw)
	if err != nil {
		probs.add("", "not valid YAML: %s", yamlMessage(err))
		return nil, false
	}
	if msg := checkJSON(doc); msg != "" { // depth
		probs.add("", "not valid YAML: %s", msg)
		return nil, false
	}
	return doc, true
}

// yamlMessage tidies a YAML library error: "yaml: line 3: …" becomes
// "line 3: …", and the converter's JSON errors say what they are.
func yamlMessage(err error) string {
	s := err.Error()
	s = strings.TrimPrefix(s, "error converting YAML to JSON: ")
	s = strings.TrimPrefix(s, "yaml: ")
	s = strings.ReplaceAll(s, "\n", " ")
	s = strings.Join(strings.Fields(s), " ")
	if strings.Contains(s, "unsupported value: +Inf") || strings.Contains(s, "unsupported value: -Inf") || strings.Contains(s, "unsupported value: NaN") {
		s = "infinities and NaN are not allowed (" + s + ")"
	}
	return s
}

// checkJSON checks that raw is exactly one JSON value, no deeper than
// maxDepth, with no key repeated in an object. It returns "" or a message
// with the line and column, or the JSON pointer, of the first problem.
func checkJSON(raw []byte) string {
	dec := json.NewDecoder(bytes.NewReader(raw))
	dec.UseNumber()
	w := &walker{dec: dec, raw: raw}
	if err := w.value("", 0); err != nil {
		return err.Error()
	}
	off := dec.InputOffset()
	if _, err := dec.Token(); err != io.EOF {
		return fmt.Sprintf("data after the top-level value at %s", position(raw, skipSpace(raw, off)))
	}
	return ""
}

type walker struct {
	dec *json.Decoder
	raw []byte
}

func (w *walker) fail(err error) error {
	var se *json.SyntaxError
	if errors.As(err, &se) {
		return fmt.Errorf("%s at %s", se.Error(), position(w.raw, se.Offset))
	}
	if err == io.EOF || errors.Is(err, io.ErrUnexpectedEOF) {
		return fmt.Errorf("unexpected end of input at %s", position(w.raw, int64(len(w.raw))))
	}
	return fmt.Errorf("%v at %s", err, position(w.raw, w.dec.InputOffset()))
}

func (w *walker) value(ptr string, depth int) error {
	if depth > maxDepth {
		return fmt.Errorf("%s: nested deeper than %d levels", orRoot(ptr), maxDepth)
	}
	tok, err := w.dec.Token()
	if err != nil {
		return w.fail(err)
	}
	d, ok := tok.(json.Delim)
	if !ok {
		return nil
	}
	switch d {
	case '{':
		seen := map[string]bool{}
		for w.dec.More() {
			kt, err := w.dec.Token()
			if err != nil {
				return w.fail(err)
			}
			k, _ := kt.(string)
			kp := ptr + "/" + escapePointer(k)
			if seen[k] {
				return fmt.Errorf("%s: key %s appears twice in the same object", kp, strconv.Quote(k))
			}
			seen[k] = true
			if err := w.value(kp, depth+1); err != nil {
				return err
			}
		}
	case '[':
		for i := 0; w.dec.More(); i++ {
			if err := w.value(ptr+"/"+strconv.Itoa(i), depth+1); err != nil {
				return err
			}
		}
	}
	if _, err := w.dec.Token(); err != nil { // the closing delimiter
		return w.fail(err)
	}
	return nil
}

func orRoot(ptr string) string {
	if ptr == "" {
		return "/"
	}
	return ptr
}

// escapePointer escapes a key for a JSON pointer (RFC 6901).
func escapePointer(k string) string {
	return strings.ReplaceAll(strings.ReplaceAll(k, "~", "~0"), "/", "~1")
}

func skipSpace(raw []byte, off int64) int64 {
	for off < int64(len(raw)) && strings.IndexByte(" \t\r\n", raw[off]) >= 0 {
		off++
	}
	return off
}

// position renders a byte offset as "line L, column C" (both from 1;
// columns count bytes).
func position(raw []byte, off int64) string {
	if off < 0 {
		off = 0
	}
	if off > int64(len(raw)) {
		off = int64(len(raw))
	}
	before := raw[:off]
	line := bytes.Count(before, []byte{'\n'}) + 1
	col := int(off) - (bytes.LastIndexByte(before, '\n') + 1) + 1
	return fmt.Sprintf("line %d, column %d", line, col)
}
