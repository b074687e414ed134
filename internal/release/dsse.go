package release

import (
	"bytes"
	"context"
	"crypto"
	"crypto/ed25519"
	"encoding/base64"
	"encoding/json"
	"errors"
	"fmt"
	"strings"

	"github.com/secure-systems-lab/go-securesystemslib/dsse"
)

// DSSE and in-toto constants (DSSE envelope.md; in-toto attestation
// Statement v1).
const (
	// PayloadType is the DSSE payloadType of an in-toto statement.
	PayloadType = "application/vnd.in-toto+json"
	// StatementType is the in-toto Statement v1 _type.
	StatementType = "https://in-toto.io/Statement/v1"

	// Predicate types of our own.
	PredicateApproval   = "https://modelgate.invalid/approval/v1"
	PredicateRelease    = "https://modelgate.invalid/release/v1"
	PredicateGateReport = "https://modelgate.invalid/gate-report/v1"
)

// MediaTypeEnvelope is the media type of a DSSE envelope blob.
const MediaTypeEnvelope = "application/vnd.dsse.envelope.v1+json"

// MediaTypeCommitted is the layer of a committed marker: JSON
// naming the record, the target and the time.
const MediaTypeCommitted = "application/vnd.modelgate.committed.v1+json"

// maxEnvelopeBytes bounds an envelope read from the store.
const maxEnvelopeBytes = 4 << 20

// Statement is an in-toto Statement v1.
type Statement struct {
	Type          string          `json:"_type"`
	Subject       []Subject       `json:"subject"`
	PredicateType string          `json:"predicateType"`
	Predicate     json.RawMessage `json:"predicate"`
}

// Subject is an in-toto resource descriptor: a name and digests by
// algorithm (hex, without the "sha256:" prefix).
type Subject struct {
	Name   string            `json:"name"`
	Digest map[string]string `json:"digest"`
}

// newStatement builds a statement about one artifact digest ("sha256:…").
func newStatement(name, digest, predicateType string, predicate any) (*Statement, error) {
	p, err := json.Marshal(predicate)
	if err != nil {
		return nil, err
	}
	return &Statement{Type: StatementType, PredicateType: predicateType, Predicate: p,
		Subject: []Subject{{Name: name, Digest: map[string]string{"sha256": strings.TrimPrefix(digest, "sha256:")}}}}, nil
}

// About reports whether the statement's subjects include digest
// ("sha256:…").
func (s *Statement) About(digest string) bool {
	hex := strings.TrimPrefix(digest, "sha256:")
	for _, sub := range s.Subject {
		if sub.Digest["sha256"] == hex {
			return true
		}
	}
	return false
}

// dsseSigner adapts a Key to the library's Signer.
type dsseSigner struct{ k *Key }

func (s dsseSigner) Sign(_ context.Context, data []byte) ([]byte, error) {
	return ed25519.Sign(s.k.private, data), nil
}
func (s dsseSigner) KeyID() (string, error) { return s.k.ID, nil }

// dsseVerifier adapts a PublicKey to the library's Verifier.
type dsseVerifier struct{ k PublicKey }

func (v dsseVerifier) Verify(_ context.Context, data, sig []byte) error {
	if len(v.k.Public) != ed25519.PublicKeySize || !ed25519.Verify(v.k.Public, data, sig) {
		return errors.New("signature does not verify")
	}
	return nil
}
func (v dsseVerifier) KeyID() (string, error)   { return v.k.ID, nil }
func (v dsseVerifier) Public() crypto.PublicKey { return v.k.Public }

// Sign wraps the statement in a DSSE envelope signed by k and returns the
// envelope's JSON. A nil k gives an envelope without signatures (an
// unsigned record).
func Sign(ctx context.Context, k *Key, st *Statement) ([]byte, error) {
	body, err := json.Marshal(st)
	if err != nil {
		return nil, err
	}
	if k == nil {
		return json.Marshal(dsse.Envelope{PayloadType: PayloadType, Payload: base64.StdEncoding.EncodeToString(body), Signatures: []dsse.Signature{}})
	}
	es, err := dsse.NewEnvelopeSigner(dsseSigner{k})
	if err != nil {
		return nil, err
	}
	env, err := es.SignPayload(ctx, PayloadType, body)
	if err != nil {
		return nil, fmt.Errorf("signing: %w", err)
	}
	return json.Marshal(env)
}

// Envelope is a parsed DSSE envelope whose payload is an in-toto
// statement. Its signatures are not verified yet: see Verify.
type Envelope struct {
	env       dsse.Envelope
	Payload   []byte
	Statement Statement
}

// Signed reports whether the envelope carries any signature.
func (e *Envelope) Signed() bool { return len(e.env.Signatures) > 0 }

// KeyIDs lists the key ids the signatures claim (unverified).
func (e *Envelope) KeyIDs() []string {
	var out []string
	for _, s := range e.env.Signatures {
		out = append(out, s.KeyID)
	}
	return out
}

// decodeB64 accepts standard and URL-safe base64, padded or not (DSSE
// envelope.md lets producers use either); the library accepts padded only.
func decodeB64(s string) ([]byte, error) {
	for _, enc := range []*base64.Encoding{base64.StdEncoding, base64.URLEncoding, base64.RawStdEncoding, base64.RawURLEncoding} {
		if b, err := enc.DecodeString(s); err == nil {
			return b, nil
		}
	}
	return nil, errors.New("not base64")
}

// ParseEnvelope parses a DSSE envelope, checks its payloadType (the
// library does not) and decodes its in-toto statement. It checks no
// signature.
func ParseEnvelope(raw []byte) (*Envelope, error) {
	var e Envelope
	dec := json.NewDecoder(bytes.NewReader(raw))
	if err := dec.Decode(&e.env); err != nil {
		return nil, fmt.Errorf("not a DSSE envelope: %v", err)
	}
	if e.env.PayloadType != PayloadType {
		return nil, fmt.Errorf("envelope payloadType is %q, want %q", e.env.PayloadType, PayloadType)
	}
	body, err := decodeB64(e.env.Payload)
	if err != nil {
		return nil, errors.New("envelope payload is not base64")
	}
	// Normalise to the padded standard encoding the library accepts.
	e.env.Payload = base64.StdEncoding.EncodeToString(body)
	for i, s := range e.env.Signatures {
		sig, err := decodeB64(s.Sig)
		if err != nil {
			return nil, fmt.Errorf("signature %d is not base64", i)
		}
		e.env.Signatures[i].Sig = base64.StdEncoding.EncodeToString(sig)
	}
	e.Payload = body
	if err := json.Unmarshal(body, &e.Statement); err != nil {
		return nil, fmt.Errorf("envelope payload is not an in-toto statement: %v", err)
	}
	if e.Statement.Type != StatementType {
		return nil, fmt.Errorf("statement _type is %q, want %q", e.Statement.Type, StatementType)
	}
	if len(e.Statement.Subject) == 0 {
		return nil, errors.New("statement has no subject")
	}
	return &e, nil
}

// VerifiedBy returns the keys among keys whose signature on the envelope
// verifies, each once, in the order of keys. Each key is tried on its own
// (one verifier per library call), so the library's stdout message about
// one key counted twice can never be printed.
func (e *Envelope) VerifiedBy(ctx context.Context, keys []PublicKey) []PublicKey {
	var out []PublicKey
	if !e.Signed() {
		return nil
	}
	seen := map[string]bool{}
	for _, k := range keys {
		if seen[string(k.Public)] {
			continue
		}
		seen[string(k.Public)] = true
		ev, err := dsse.NewEnvelopeVerifier(dsseVerifier{k})
		if err != nil {
			continue
		}
		env := e.env
		env.Signatures = append([]dsse.Signature(nil), e.env.Signatures...)
		if _, err := ev.Verify(ctx, &env); err == nil {
			out = append(out, k)
		}
	}
	return out
}

// PAE is DSSE's pre-authentication encoding of a payload (protocol.md),
// what a signature covers.
func PAE(payloadType string, payload []byte) []byte { return dsse.PAE(payloadType, payload) }
