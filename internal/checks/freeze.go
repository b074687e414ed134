package checks

import (
	"context"
	"fmt"
	"sort"
	"strings"

	"github.com/modelgate/modelgate/internal/artifact"
	"github.com/modelgate/modelgate/internal/freeze"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/registry"
)

// FreezeConfig holds the freeze check's rules.
type FreezeConfig struct {
	Enabled bool
	// RequireFrozen demands that the encoder travel inside the scorer as
	// constants (embedded); otherwise an encoder referenced by digest is
	// accepted.
	RequireFrozen bool
	// EncoderTag, when set (NAME:TAG), is the tag whose current target the
	// scorer's encoder must be; EncoderTagDigest is that target, resolved
	// by the caller ("" when the tag does not exist).
	EncoderTag       string
	EncoderTagDigest string
}

// Freeze checks that a scorer's encoder part is constants: no trainable
// flag, no optimizer slot, no regularisation term or dropout attached, and
// (when embedded) its encoder tensor bytes identical by digest to the
// encoder version the spec names. Every finding names the tensor.
func Freeze(ctx context.Context, store registry.Store, l *artifact.Loaded, cfg FreezeConfig) CheckResult {
	res := CheckResult{Name: CheckFreeze}
	s := l.Spec
	if s.Kind != model.KindScorer {
		res.Status, res.Summary = StatusSkip, "not a scorer: nothing to freeze"
		return res
	}
	fail := func(code, where, format string, args ...any) {
		res.Findings = append(res.Findings, Finding{Status: StatusFail, Code: code, Where: where, Message: fmt.Sprintf(format, args...)})
	}
	warn := func(code, where, format string, args ...any) {
		res.Findings = append(res.Findings, Finding{Status: StatusWarn, Code: code, Where: where, Message: fmt.Sprintf(format, args...)})
	}
	verified := ""
	enc := s.Encoder
	if enc == nil {
		fail("freeze.no-encoder", "spec.json /encoder", "the scorer names no encoder")
		finish(&res)
		res.Summary = "the scorer names no encoder"
		return res
	}
	for _, t := range s.Tensors {
		switch {
		case t.Part == "training":
			fail("freeze.training-tensor", t.Name, "tensor %q is training-only state (part \"training\") stored with the model", t.Name)
		case t.Trainable && t.Part == "encoder":
			fail("freeze.trainable", t.Name, "encoder tensor %q is still marked trainable: it must be a constant", t.Name)
		case t.Trainable:
			warn("freeze.trainable-head", t.Name, "tensor %q is marked trainable; serving treats it as a constant", t.Name)
		}
	}
	if tr := s.Training; tr != nil {
		for _, o := range tr.OptimizerSlots {
			fail("freeze.optimizer-slot", o.Tensor, "optimizer slot %q of %q is attached in tensor %q", o.Slot, o.Of, o.Tensor)
		}
		for _, r := range tr.Regularization {
			fail("freeze.regularization", r.Tensor, "an %s regularisation term (weight %g) is attached to %q", r.Type, r.Weight, r.Tensor)
		}
		for _, d := range tr.Dropout {
			fail("freeze.dropout", d.Layer, "dropout %g is attached after layer %q", d.Rate, d.Layer)
		}
	}
	if cfg.EncoderTag != "" {
		switch {
		case cfg.EncoderTagDigest == "":
			fail("freeze.encoder-tag", cfg.EncoderTag, "the policy requires the encoder %s points at, but that tag does not exist", cfg.EncoderTag)
		case cfg.EncoderTagDigest != enc.Digest:
			fail("freeze.encoder-tag", cfg.EncoderTag, "the scorer's encoder is %s, but %s points at %s", enc.Digest, cfg.EncoderTag, cfg.EncoderTagDigest)
		}
	}
	if !enc.Embedded {
		if cfg.RequireFrozen {
			fail("freeze.not-frozen", "spec.json /encoder", "the encoder %s is referenced by digest, not embedded as constants: run `modelgate freeze`", enc.Digest)
		}
		if l.Encoder == nil {
			fail("freeze.encoder-missing", enc.Digest, "the encoder %s the scorer references is not in the store", enc.Digest)
		}
	} else {
		compareEmbedded(ctx, store, l, fail)
		// The frozen artifact's outputs must equal the unfrozen composition
		// (encoder run separately, then the head): the freeze package's
		// verification, the same one `modelgate freeze` stores.
		v, err := freeze.Verify(ctx, store, l)
		switch {
		case err != nil:
			fail("freeze.verify", "", "the frozen scorer could not be verified: %v", err)
		case !v.Passed:
			for _, p := range v.Problems {
				fail("freeze.verify", v.Reference, "%s", p)
			}
		default:
			verified = fmt.Sprintf("; outputs equal the unfrozen composition on %d outputs (max abs %.3g, %s)", v.Outputs, v.MaxAbs, v.Reference)
		}
	}
	finish(&res)
	n := 0
	for _, f := range res.Findings {
		if f.Status == StatusFail {
			n++
		}
	}
	switch {
	case res.Status == StatusFail:
		res.Summary = fmt.Sprintf("%d finding(s): %s", n, firstFail(res.Findings))
	case enc.Embedded:
		res.Summary = "encoder embedded as constants, byte-identical to " + enc.Digest + verified
	default:
		res.Summary = "encoder referenced by digest " + enc.Digest + "; no training state attached"
	}
	return res
}

func firstFail(fs []Finding) string {
	for _, f := range fs {
		if f.Status == StatusFail {
			return f.Message
		}
	}
	return ""
}

// compareEmbedded checks that an embedded encoder's tensor blobs are the
// named encoder artifact's own blobs, by digest.
func compareEmbedded(ctx context.Context, store registry.Store, l *artifact.Loaded, fail func(code, where, format string, args ...any)) {
	enc := l.Spec.Encoder
	loc, err := artifact.FindEncoder(ctx, store, enc)
	if err != nil {
		fail("freeze.encoder-missing", enc.Digest, "the encoder version the spec names is not in the store: %v", err)
		return
	}
	ea, err := artifact.ReadArtifact(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest})
	if err != nil {
		fail("freeze.encoder-missing", enc.Digest, "reading the named encoder: %v", err)
		return
	}
	ours := map[string]string{} // digest → title
	for _, d := range l.Artifact.Manifest.Layers {
		ours[d.Digest.String()] = d.Annotations[artifact.AnnotationTitle]
	}
	for _, d := range ea.Manifest.Layers {
		if d.MediaType != artifact.MediaTypeTensors || !strings.Contains(d.Annotations[artifact.AnnotationPart], "encoder") {
			continue
		}
		if _, ok := ours[d.Digest.String()]; ok {
			continue
		}
		// Name the tensors that differ, when we can.
		var names []string
		if el, err := artifact.Load(ctx, store, registry.Ref{Repository: loc.Repository, Digest: loc.Digest}); err == nil && el.Spec != nil {
			for _, t := range el.Spec.Tensors {
				if t.File != d.Annotations[artifact.AnnotationTitle] {
					continue
				}
				mine, ok := l.Tensors[t.Name]
				if !ok {
					names = append(names, t.Name+" (absent)")
					continue
				}
				if !equalF32(mine, el.Tensors[t.Name]) {
					names = append(names, t.Name)
				}
			}
		}
		sort.Strings(names)
		fail("freeze.encoder-bytes", d.Annotations[artifact.AnnotationTitle],
			"the embedded encoder does not carry the named encoder's blob %s (%s); differing tensors: %s",
			d.Digest, d.Annotations[artifact.AnnotationTitle], strings.Join(names, ", "))
	}
}

func equalF32(a, b []float32) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		if a[i] != b[i] {
			return false
		}
	}
	return true
}
