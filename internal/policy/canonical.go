package policy

import (
	"bytes"
	"crypto/x509"
	"encoding/json"
	"encoding/pem"
	"fmt"
	"sort"
	"strconv"
	"strings"
)

// canonical returns the canonical form of a schema-valid document: JSON,
// object keys sorted, no insignificant space, numbers as RFC 8785 writes
// them (encoding/json writes a float64 as ECMAScript does; the schema
// keeps every integer within ±2^53, so each is exact), every keyFile
// replaced by the key it names and every publicKey re-encoded as one
// standard PEM block. name locates key files, as in Parse.
func canonical(name string, doc []byte) ([]byte, error) {
	dec := json.NewDecoder(bytes.NewReader(doc))
	dec.UseNumber()
	var v any
	if err := dec.Decode(&v); err != nil {
		return nil, err
	}
	v, err := canonValue(name, v)
	if err != nil {
		return nil, err
	}
	var out bytes.Buffer
	enc := json.NewEncoder(&out)
	enc.SetEscapeHTML(false)
	if err := enc.Encode(v); err != nil {
		return nil, err
	}
	return bytes.TrimSuffix(out.Bytes(), []byte("\n")), nil
}

func canonValue(name string, v any) (any, error) {
	switch x := v.(type) {
	case json.Number:
		f, err := strconv.ParseFloat(string(x), 64)
		if err != nil {
			return nil, fmt.Errorf("number %s: %v", x, err)
		}
		return f, nil
	case []any:
		for i := range x {
			c, err := canonValue(name, x[i])
			if err != nil {
				return nil, err
			}
			x[i] = c
		}
		return x, nil
	case map[string]any:
		if kf, ok := x["keyFile"].(string); ok {
			b, err := readKeyFile(name, kf)
			if err != nil {
				return nil, err
			}
			delete(x, "keyFile")
			x["publicKey"] = string(b)
		}
		if pk, ok := x["publicKey"].(string); ok {
			pub, err := ParsePublicKey([]byte(pk))
			if err != nil {
				return nil, err
			}
			der, err := x509.MarshalPKIXPublicKey(pub)
			if err != nil {
				return nil, err
			}
			x["publicKey"] = string(pem.EncodeToMemory(&pem.Block{Type: "PUBLIC KEY", Bytes: der}))
		}
		for k := range x {
			c, err := canonValue(name, x[k])
			if err != nil {
				return nil, err
			}
			x[k] = c
		}
		return x, nil
	}
	return v, nil
}

// Diff lists what differs between two policies' canonical forms, one
// line per changed, added or removed setting, labelled by its JSON
// pointer ("/rules/0/approvals/required: 2 → 0"); keys are shown by name
// and a short form of the key. It returns nil when the digests are equal.
func Diff(from, to *Policy) []string {
	if from.Digest() == to.Digest() {
		return nil
	}
	var a, b any
	if json.Unmarshal(from.canonical, &a) != nil || json.Unmarshal(to.canonical, &b) != nil {
		return []string{"the policies differ (digest " + from.Digest() + " → " + to.Digest() + ")"}
	}
	var out []string
	diffValue("", a, b, &out)
	if len(out) == 0 {
		out = append(out, "the policies differ (digest "+from.Digest()+" → "+to.Digest()+")")
	}
	return out
}

func diffValue(ptr string, a, b any, out *[]string) {
	am, aok := a.(map[string]any)
	bm, bok := b.(map[string]any)
	if aok && bok {
		keys := map[string]bool{}
		for k := range am {
			keys[k] = true
		}
		for k := range bm {
			keys[k] = true
		}
		sorted := make([]string, 0, len(keys))
		for k := range keys {
			sorted = append(sorted, k)
		}
		sort.Strings(sorted)
		for _, k := range sorted {
			av, ina := am[k]
			bv, inb := bm[k]
			p := ptr + "/" + escapePointer(k)
			switch {
			case !ina:
				*out = append(*out, fmt.Sprintf("%s: added %s", p, show(bv)))
			case !inb:
				*out = append(*out, fmt.Sprintf("%s: removed (was %s)", p, show(av)))
			default:
				diffValue(p, av, bv, out)
			}
		}
		return
	}
	as, aok := a.([]any)
	bs, bok := b.([]any)
	if aok && bok {
		for i := 0; i < len(as) || i < len(bs); i++ {
			p := ptr + "/" + strconv.Itoa(i)
			switch {
			case i >= len(as):
				*out = append(*out, fmt.Sprintf("%s: added %s", p, show(bs[i])))
			case i >= len(bs):
				*out = append(*out, fmt.Sprintf("%s: removed (was %s)", p, show(as[i])))
			default:
				diffValue(p, as[i], bs[i], out)
			}
		}
		return
	}
	if show(a) != show(b) {
		*out = append(*out, fmt.Sprintf("%s: %s → %s", orRoot(ptr), show(a), show(b)))
	}
}

// show renders a canonical value on one line; a PEM key is shortened to
// its last characters, an object holding a key to its name.
func show(v any) string {
	switch x := v.(type) {
	case string:
		if strings.HasPrefix(x, "-----BEGIN") {
			body := strings.Join(strings.Fields(strings.TrimSuffix(strings.TrimPrefix(x, "-----BEGIN PUBLIC KEY-----"), "-----END PUBLIC KEY-----\n")), "")
			if len(body) > 12 {
				body = "…" + body[len(body)-12:]
			}
			return "key " + body
		}
	case map[string]any:
		if n, ok := x["name"].(string); ok {
			if _, isKey := x["publicKey"]; isKey {
				return fmt.Sprintf("key of %q (%s)", n, show(x["publicKey"]))
			}
		}
	}
	b, err := json.Marshal(v)
	if err != nil {
		return fmt.Sprint(v)
	}
	return string(b)
}
