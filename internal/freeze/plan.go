package freeze

import (
	"bytes"
	"encoding/json"
	"fmt"
	"maps"
	"math"
	"slices"
	"sort"
	"strings"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/modeldir"
	"github.com/modelgate/modelgate/internal/model/safetensors"
)

// stored is what freeze needs of a stored model: its decoded content and
// the raw bytes of its files by name.
type stored struct {
	Spec    *model.Spec
	Tensors map[string][]float32
	Probes  []modeldir.Probe
	// Raw returns a file's bytes as stored (spec.json excluded).
	Raw func(name string) ([]byte, error)
	// Digest of the artifact's manifest, and a name for messages.
	Digest string
	Ref    string
}

// plan is a frozen scorer before it is pushed: its spec and files, and
// what building it did.
type plan struct {
	spec        *model.Spec
	specBytes   []byte
	tensorFiles []modeldir.File // sorted by name
	vocab       modeldir.File
	stats       *modeldir.File
	probes      *modeldir.File
	probeRows   []modeldir.Probe
	tensors     map[string][]float32 // decoded from tensorFiles

	stripped []Stripped
	renamed  []Renamed
	shared   []SharedBlob
	head     []HeadFile
	copyCmp  *CopyComparison
	notes    []string
}

// layerRefs lists the names a layer reads.
func layerRefs(l model.Layer) []string {
	var out []string
	if l.Input != "" {
		out = append(out, l.Input)
	}
	return append(out, l.Inputs...)
}

// layerTensors lists the tensors a layer uses, with their role.
func layerTensors(l model.Layer) [][2]string {
	var out [][2]string
	for _, f := range [][2]string{{"weight", l.Weight}, {"tiedTo", l.TiedTo}, {"bias", l.Bias}} {
		if f[1] != "" {
			out = append(out, f)
		}
	}
	return out
}

// closure returns the layers of ls that the named layers depend on,
// themselves included (names that are not layers are ignored).
func closure(ls []model.Layer, names ...string) map[string]bool {
	byName := map[string]model.Layer{}
	for _, l := range ls {
		byName[l.Name] = l
	}
	out := map[string]bool{}
	var visit func(string)
	visit = func(n string) {
		l, ok := byName[n]
		if !ok || out[n] {
			return
		}
		out[n] = true
		for _, r := range layerRefs(l) {
			visit(r)
		}
	}
	for _, n := range names {
		visit(n)
	}
	return out
}

// uniqueName returns base, or base with a prefix and counter, that taken
// does not hold.
func uniqueName(base, prefix string, taken func(string) bool) string {
	if !taken(base) {
		return base
	}
	for i := 1; ; i++ {
		n := prefix + base
		if i > 1 {
			n = fmt.Sprintf("%s%s.%d", prefix, base, i)
		}
		if !taken(n) {
			return n
		}
	}
}

func badInput(format string, args ...any) error {
	return errkind.New(errkind.BadInput, format, args...)
}

// checkSparse requires the scorer and the encoder to read the same sparse
// input: the runtime's rule for a scorer that references an encoder.
func checkSparse(s, e *model.Spec) error {
	a, b := s.Inputs.Sparse[0], e.Inputs.Sparse[0]
	if a.Name != b.Name || a.VocabularySize != b.VocabularySize || a.Unknown != b.Unknown ||
		a.Transform != b.Transform || a.Duplicates != b.Duplicates {
		return badInput("scorer %q reads sparse input {name %q, vocabularySize %d, unknown %s, transform %s, duplicates %s}, but encoder %q reads {name %q, vocabularySize %d, unknown %s, transform %s, duplicates %s}",
			s.Name, a.Name, a.VocabularySize, a.Unknown, a.Transform, a.Duplicates,
			e.Name, b.Name, b.VocabularySize, b.Unknown, b.Transform, b.Duplicates)
	}
	dense := map[string]int{}
	for _, d := range s.Inputs.Dense {
		dense[d.Name] = d.Size
	}
	for _, d := range e.Inputs.Dense {
		if dense[d.Name] != d.Size {
			return badInput("encoder %q reads dense input %q (size %d), which scorer %q does not have at that size", e.Name, d.Name, d.Size, s.Name)
		}
	}
	return nil
}

// encoderSide returns, for a scorer that embeds its encoder, its layers
// that stand for the named encoder's layers: those named like one of them.
// The layers the embedded encoder output depends on must all be such.
func encoderSide(s, e *model.Spec) (map[string]bool, error) {
	eLayers := map[string]model.Layer{}
	for _, l := range e.Layers {
		eLayers[l.Name] = l
	}
	side := map[string]bool{}
	for _, l := range s.Layers {
		if _, ok := eLayers[l.Name]; ok {
			side[l.Name] = true
		}
	}
	var missing []string
	for n := range closure(s.Layers, s.Encoder.Output) {
		if !side[n] {
			missing = append(missing, n)
		}
	}
	if len(missing) > 0 {
		sort.Strings(missing)
		return nil, badInput("scorer %q embeds an encoder whose output %q depends on layer(s) %s that encoder %q (%s) does not have: the embedded encoder is not a copy of the one the spec names",
			s.Name, s.Encoder.Output, strings.Join(missing, ", "), e.Name, s.Encoder.Digest)
	}
	return side, nil
}

// consumedLayers lists, in first-use order, the encoder layers a scorer's
// head reads (the encoder output first), by their names in the encoder.
func consumedLayers(s *model.Spec, side map[string]bool) []string {
	out := []string{s.Encoder.Output}
	seen := map[string]bool{s.Encoder.Output: true}
	for _, l := range s.Layers {
		if side[l.Name] {
			continue
		}
		for _, r := range layerRefs(l) {
			x, ok := encoderRef(s, side, r)
			if ok && !seen[x] {
				seen[x] = true
				out = append(out, x)
			}
		}
	}
	return out
}

// encoderRef maps a head layer's input to the encoder layer it names.
func encoderRef(s *model.Spec, side map[string]bool, ref string) (string, bool) {
	if s.Encoder.Embedded {
		return ref, side[ref]
	}
	if strings.HasPrefix(ref, model.EncoderPrefix) {
		return strings.TrimPrefix(ref, model.EncoderPrefix), true
	}
	return "", false
}

// buildPlan makes the frozen scorer of src on the encoder enc. storage is
// "" or f32 (head kept as stored), f16 or bf16 (head converted).
func buildPlan(src, enc *stored, storage string) (*plan, error) {
	s, e := src.Spec, enc.Spec
	if e.Kind != model.KindEncoder {
		return nil, badInput("%s (%s) is a %s, not an encoder", enc.Ref, enc.Digest, e.Kind)
	}
	if err := checkSparse(s, e); err != nil {
		return nil, err
	}
	p := &plan{}
	embedded := s.Encoder.Embedded
	side := map[string]bool{}
	if embedded {
		var err error
		if side, err = encoderSide(s, e); err != nil {
			return nil, err
		}
	}
	eLayers := map[string]model.Layer{}
	for _, l := range e.Layers {
		eLayers[l.Name] = l
	}
	consumed := consumedLayers(s, side)
	for _, x := range consumed {
		if _, ok := eLayers[x]; !ok {
			return nil, badInput("scorer %q consumes encoder layer %q, but encoder %q (%s) has no such layer (it has %s)",
				s.Name, x, e.Name, enc.Digest, strings.Join(layerNames(e.Layers), ", "))
		}
	}
	eNet, err := model.Compile(e, enc.Tensors, nil)
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "encoder %s does not compile: %w", enc.Ref, err)
	}
	var sEnc *model.Encoder
	if !embedded {
		sEnc = &model.Encoder{Spec: e, Weights: enc.Tensors}
	}
	sNet, err := model.Compile(s, src.Tensors, sEnc)
	if embedded && err == nil {
		for _, x := range consumed {
			if sw, ew := sNet.Width(x), eNet.Width(x); sw != ew {
				return nil, badInput("shape mismatch: scorer %q consumes its embedded layer %q as %d values per row, but encoder %q (%s) computes %d",
					s.Name, x, sw, e.Name, enc.Digest, ew)
			}
		}
	}
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "scorer %q does not compile with encoder %s (a shape mismatch between the encoder's layers and what the scorer consumes?): %w", s.Name, enc.Digest, err)
	}
	if embedded {
		for _, n := range slices.Sorted(maps.Keys(side)) {
			sl, el := layerByName(s.Layers, n), eLayers[n]
			if sl.Op != el.Op || act(sl.Activation) != act(el.Activation) || len(layerTensors(sl)) != len(layerTensors(el)) {
				return nil, badInput("scorer %q's embedded layer %q (%s, %s) differs in kind from encoder %q's (%s, %s): not a copy of the named encoder",
					s.Name, n, sl.Op, act(sl.Activation), e.Name, el.Op, act(el.Activation))
			}
		}
	}

	// The encoder's layers to copy, its tensors they use, and the blobs
	// holding those (and any blob of encoder-part tensors).
	copySet := closure(e.Layers, consumed...)
	var copied []model.Layer
	usedE := map[string]bool{}
	for _, l := range e.Layers {
		if copySet[l.Name] {
			copied = append(copied, l)
			for _, t := range layerTensors(l) {
				usedE[t[1]] = true
			}
		}
	}
	slots := map[string]bool{}
	if e.Training != nil {
		for _, o := range e.Training.OptimizerSlots {
			slots[o.Tensor] = true
		}
	}
	shareFile := map[string]bool{}
	for _, t := range e.Tensors {
		if usedE[t.Name] || t.Part == model.KindEncoder {
			shareFile[t.File] = true
		}
	}
	var encTensors []model.Tensor
	eTensorNames := map[string]bool{}
	for _, t := range e.Tensors {
		if !shareFile[t.File] {
			continue
		}
		if t.Part == "training" || slots[t.Name] {
			return nil, badInput("encoder %s stores training state %q in %s, beside the tensors the scorer needs: sharing that blob would attach it to the frozen scorer; publish an encoder version without it",
				enc.Ref, t.Name, t.File)
		}
		if t.Trainable {
			p.strip("trainable", t.Name, "encoder tensor marked trainable in the encoder's spec; constant in the frozen scorer")
		}
		t.Trainable = false
		encTensors = append(encTensors, t)
		eTensorNames[t.Name] = true
	}
	if e.Training != nil {
		for _, d := range e.Training.Dropout {
			if copySet[d.Layer] {
				p.strip("dropout", d.Layer, fmt.Sprintf("the encoder's dropout (rate %g) after layer %q: identity at inference", d.Rate, d.Layer))
			}
		}
	}

	// The head: the scorer's layers and tensors that are not its own
	// copy of the encoder and not training state.
	sSlots := map[string]model.OptimizerSlot{}
	if tr := s.Training; tr != nil {
		for _, o := range tr.OptimizerSlots {
			sSlots[o.Tensor] = o
		}
		for _, r := range tr.Regularization {
			p.strip("regularization", r.Tensor, fmt.Sprintf("%s term, weight %g", r.Type, r.Weight))
		}
		for _, d := range tr.Dropout {
			p.strip("dropout", d.Layer, fmt.Sprintf("rate %g after layer %q: identity at inference", d.Rate, d.Layer))
		}
	}
	usedByHead := map[string]bool{}
	for _, l := range s.Layers {
		if !side[l.Name] {
			for _, t := range layerTensors(l) {
				usedByHead[t[1]] = true
			}
		}
	}
	drop := map[string]bool{}
	ownCopy := map[string]bool{}
	for _, t := range s.Tensors {
		switch {
		case t.Part == "training" || sSlots[t.Name].Tensor != "":
			drop[t.Name] = true
			detail := "training-only state (part \"training\")"
			if o, ok := sSlots[t.Name]; ok {
				p.strip("optimizer-slot", t.Name, fmt.Sprintf("slot %q of %q, stored in %s", o.Slot, o.Of, t.File))
				continue
			}
			p.strip("training-tensor", t.Name, detail+", stored in "+t.File)
		case embedded && !usedByHead[t.Name] && (t.Part == model.KindEncoder || t.Part == "decoder"):
			drop[t.Name] = true
			ownCopy[t.Name] = true
		}
	}
	// Head layers: drop those that cannot be computed without dropped
	// tensors (an unused copy of the encoder's decoder, say).
	var head []model.Layer
	gone := map[string]bool{}
	for _, l := range s.Layers {
		if side[l.Name] {
			continue
		}
		why := ""
		for _, t := range layerTensors(l) {
			if drop[t[1]] {
				why = fmt.Sprintf("uses dropped tensor %q", t[1])
			}
		}
		for _, r := range layerRefs(l) {
			if gone[r] {
				why = fmt.Sprintf("reads dropped layer %q", r)
			}
		}
		if why != "" {
			if closure(s.Layers, s.Output)[l.Name] {
				return nil, badInput("scorer %q: layer %q, which the output %q needs, %s (training state or the scorer's own copy of the encoder)", s.Name, l.Name, s.Output, why)
			}
			gone[l.Name] = true
			p.strip("layer", l.Name, "not needed for the output; "+why)
			continue
		}
		head = append(head, l)
	}
	for _, t := range s.Tensors {
		switch {
		case ownCopy[t.Name]:
			what := "the scorer's own copy of an encoder tensor"
			if t.Trainable {
				what = "the scorer's own copy of an encoder tensor, marked trainable"
			}
			p.strip("embedded-copy", t.Name, what+"; replaced by the named encoder's constant of the same layer")
		case t.Trainable && !drop[t.Name]:
			p.strip("trainable", t.Name, "marked trainable; constant in the frozen scorer")
		case t.Trainable:
			p.strip("trainable", t.Name, "marked trainable (the tensor itself is dropped)")
		}
	}

	// Names: the encoder's are kept; clashing scorer names are renamed.
	inputs := map[string]bool{s.Inputs.Sparse[0].Name: true}
	for _, d := range s.Inputs.Dense {
		inputs[d.Name] = true
	}
	for _, l := range e.Layers {
		if inputs[l.Name] {
			return nil, badInput("encoder %q has a layer named %q, like an input of scorer %q: the names cannot be reconciled", e.Name, l.Name, s.Name)
		}
	}
	layerNew := map[string]string{}
	taken := map[string]bool{}
	for n := range inputs {
		taken[n] = true
	}
	for _, l := range e.Layers {
		taken[l.Name] = true
	}
	for _, l := range head {
		taken[l.Name] = true
	}
	for _, l := range head {
		if _, clash := eLayers[l.Name]; clash {
			n := uniqueName(l.Name, "head.", func(x string) bool { return taken[x] })
			taken[n] = true
			layerNew[l.Name] = n
			p.rename("layer", l.Name, n)
		}
	}
	tensorNew := map[string]string{}
	tTaken := map[string]bool{}
	for _, t := range s.Tensors {
		tTaken[t.Name] = true
	}
	for n := range eTensorNames {
		tTaken[n] = true
	}
	for _, t := range s.Tensors {
		if !drop[t.Name] && eTensorNames[t.Name] && !ownCopy[t.Name] {
			n := uniqueName(t.Name, "head.", func(x string) bool { return tTaken[x] })
			tTaken[n] = true
			tensorNew[t.Name] = n
			p.rename("tensor", t.Name, n)
		}
	}
	fileNew := map[string]string{}
	fTaken := map[string]bool{}
	for f := range shareFile {
		fTaken[f] = true
	}
	other := []string{s.Inputs.Sparse[0].Vocabulary, s.Files.Stats, s.Files.Probes}
	for _, f := range other {
		if f != "" && shareFile[f] {
			return nil, badInput("scorer %q's file %q has the name of encoder file %q", s.Name, f, f)
		}
		fTaken[f] = true
	}
	for _, t := range s.Tensors {
		fTaken[t.File] = true
	}
	for _, t := range s.Tensors {
		if drop[t.Name] || !shareFile[t.File] || fileNew[t.File] != "" {
			continue
		}
		n := uniqueName(strings.TrimSuffix(t.File, ".safetensors"), "head-", func(x string) bool { return fTaken[x+".safetensors"] }) + ".safetensors"
		fTaken[n] = true
		fileNew[t.File] = n
		p.rename("file", t.File, n)
	}
	mapName := func(m map[string]string, n string) string {
		if v, ok := m[n]; ok {
			return v
		}
		return n
	}

	// The frozen spec.
	fs := &model.Spec{
		SchemaVersion: s.SchemaVersion, Kind: model.KindScorer, Name: s.Name, Description: s.Description,
		Inputs:  s.Inputs,
		Output:  mapName(layerNew, s.Output),
		Lineage: s.Lineage,
		Files:   s.Files,
	}
	fs.Lineage.FrozenFrom = src.Digest
	fs.Encoder = &model.EncoderRef{Name: s.Encoder.Name, Digest: enc.Digest, Embedded: true, Output: s.Encoder.Output}
	fs.Layers = append(fs.Layers, copied...)
	for _, l := range head {
		m := l
		m.Name = mapName(layerNew, l.Name)
		if m.Input != "" {
			m.Input = p.rewriteRef(s, side, layerNew, l.Input)
		}
		if len(l.Inputs) > 0 {
			m.Inputs = make([]string, len(l.Inputs))
			for i, r := range l.Inputs {
				m.Inputs[i] = p.rewriteRef(s, side, layerNew, r)
			}
		}
		if m.Weight != "" {
			m.Weight = mapName(tensorNew, m.Weight)
		}
		if m.TiedTo != "" {
			m.TiedTo = mapName(tensorNew, m.TiedTo)
		}
		if m.Bias != "" {
			m.Bias = mapName(tensorNew, m.Bias)
		}
		fs.Layers = append(fs.Layers, m)
	}
	fs.Tensors = append(fs.Tensors, encTensors...)

	// Encoder blobs, shared as they are.
	var shareNames []string
	for f := range shareFile {
		shareNames = append(shareNames, f)
	}
	sort.Strings(shareNames)
	var files []modeldir.File
	for _, f := range shareNames {
		b, err := enc.Raw(f)
		if err != nil {
			return nil, fmt.Errorf("reading encoder file %s: %w", f, err)
		}
		files = append(files, modeldir.File{Name: f, Bytes: b})
		sb := SharedBlob{File: f, Digest: digestOf(b), Size: int64(len(b))}
		for _, t := range encTensors {
			if t.File == f {
				sb.Tensors = append(sb.Tensors, t.Name)
			}
		}
		p.shared = append(p.shared, sb)
	}

	// Head files: byte-identical when nothing in them changes.
	target := map[string]string{StorageF16: safetensors.F16, StorageBF16: safetensors.BF16}[storage]
	byFile := map[string][]model.Tensor{}
	var headFileNames []string
	for _, t := range s.Tensors {
		if _, seen := byFile[t.File]; !seen {
			headFileNames = append(headFileNames, t.File)
		}
		byFile[t.File] = append(byFile[t.File], t)
	}
	sort.Strings(headFileNames)
	for _, f := range headFileNames {
		var keep []model.Tensor
		var origName []string
		changed := false
		for _, t := range byFile[f] {
			if drop[t.Name] {
				changed = true
				continue
			}
			nt := t
			nt.Name = mapName(tensorNew, t.Name)
			nt.File = mapName(fileNew, t.File)
			nt.Trainable = false
			if target != "" && nt.DType != target {
				nt.DType = target
				changed = true
			}
			if nt.Name != t.Name {
				changed = true
			}
			keep = append(keep, nt)
			origName = append(origName, t.Name)
		}
		if len(keep) == 0 {
			what := "held only training state"
			switch {
			case allOwnCopy(byFile[f], ownCopy):
				what = "held only the scorer's own copy of the encoder, replaced by the encoder's blob"
			case anyOwnCopy(byFile[f], ownCopy):
				what = "held only training state and the scorer's own copy of the encoder"
			}
			p.strip("file", f, what)
			continue
		}
		fs.Tensors = append(fs.Tensors, keep...)
		name := mapName(fileNew, f)
		hf := HeadFile{File: name, Source: f}
		for _, t := range keep {
			hf.Tensors = append(hf.Tensors, t.Name)
		}
		var b []byte
		if !changed {
			if b, err = src.Raw(f); err != nil {
				return nil, fmt.Errorf("reading scorer file %s: %w", f, err)
			}
			hf.Identical = true
		} else {
			ts := make([]safetensors.Tensor, len(keep))
			for i, t := range keep {
				ts[i] = safetensors.Tensor{Name: t.Name, DType: t.DType, Shape: t.Shape, Data: src.Tensors[origName[i]]}
			}
			if b, err = safetensors.Encode(ts, nil); err != nil {
				return nil, fmt.Errorf("encoding %s: %w", name, err)
			}
			hf.Why = p.reencodeReason(byFile[f], drop, tensorNew, target)
		}
		hf.Digest, hf.Size = digestOf(b), int64(len(b))
		files = append(files, modeldir.File{Name: name, Bytes: b})
		p.head = append(p.head, hf)
	}
	sort.Slice(files, func(i, j int) bool { return files[i].Name < files[j].Name })
	p.tensorFiles = files
	p.spec = fs

	// Probes: "encoder/<x>" expectations become "<x>"; expectations of
	// layers the frozen scorer does not have are dropped.
	if err := p.planProbes(src, s, side, layerNew, fs); err != nil {
		return nil, err
	}
	// Spec, validated like a pushed one, and the tensors decoded from the
	// exact bytes that will be stored.
	if err := p.finish(src); err != nil {
		return nil, err
	}
	if embedded {
		p.copyCmp = compareCopy(s, e, side, src.Tensors, enc.Tensors)
	}
	return p, nil
}

func anyOwnCopy(ts []model.Tensor, own map[string]bool) bool {
	for _, t := range ts {
		if own[t.Name] {
			return true
		}
	}
	return false
}

func allOwnCopy(ts []model.Tensor, own map[string]bool) bool {
	for _, t := range ts {
		if !own[t.Name] {
			return false
		}
	}
	return true
}

func layerNames(ls []model.Layer) []string {
	out := make([]string, len(ls))
	for i, l := range ls {
		out[i] = l.Name
	}
	return out
}

func layerByName(ls []model.Layer, n string) model.Layer {
	for _, l := range ls {
		if l.Name == n {
			return l
		}
	}
	return model.Layer{}
}

func act(a string) string {
	if a == "" {
		return model.ActIdentity
	}
	return a
}

func (p *plan) strip(kind, name, detail string) {
	p.stripped = append(p.stripped, Stripped{Kind: kind, Name: name, Detail: detail})
}

func (p *plan) rename(kind, from, to string) {
	p.renamed = append(p.renamed, Renamed{Kind: kind, From: from, To: to})
}

func (p *plan) rewriteRef(s *model.Spec, side map[string]bool, layerNew map[string]string, ref string) string {
	if x, ok := encoderRef(s, side, ref); ok {
		return x
	}
	if n, ok := layerNew[ref]; ok {
		return n
	}
	return ref
}

func (p *plan) reencodeReason(ts []model.Tensor, drop map[string]bool, renamed map[string]string, target string) string {
	var why []string
	for _, t := range ts {
		switch {
		case drop[t.Name]:
			why = append(why, "without "+t.Name)
		case renamed[t.Name] != "":
			why = append(why, fmt.Sprintf("%s renamed %s", t.Name, renamed[t.Name]))
		}
	}
	if target != "" {
		why = append(why, "converted to "+target)
	}
	return strings.Join(why, "; ")
}

func (p *plan) planProbes(src *stored, s *model.Spec, side map[string]bool, layerNew map[string]string, fs *model.Spec) error {
	name := s.Files.Probes
	if name == "" {
		return nil
	}
	layers := map[string]bool{}
	for _, l := range fs.Layers {
		layers[l.Name] = true
	}
	changed := false
	dropped := map[string]bool{}
	out := make([]modeldir.Probe, len(src.Probes))
	for i, pr := range src.Probes {
		np := pr
		np.Expect = map[string][]float32{}
		for k, v := range pr.Expect {
			nk := k
			if x, ok := encoderRef(s, side, k); ok {
				nk = x
			} else if n, ok := layerNew[k]; ok {
				nk = n
			}
			if !layers[nk] {
				changed = true
				dropped[k] = true
				continue
			}
			if nk != k {
				changed = true
			}
			np.Expect[nk] = v
		}
		if len(np.Expect) == 0 {
			return badInput("probe row %d of %s expects only layers the frozen scorer does not have", i+1, src.Ref)
		}
		out[i] = np
	}
	for _, k := range slices.Sorted(maps.Keys(dropped)) {
		p.notes = append(p.notes, fmt.Sprintf("probe expectations for layer %q dropped: the frozen scorer does not compute it", k))
	}
	p.probeRows = out
	if !changed {
		b, err := src.Raw(name)
		if err != nil {
			return fmt.Errorf("reading %s: %w", name, err)
		}
		p.probes = &modeldir.File{Name: name, Bytes: b}
		return nil
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	for _, pr := range out {
		if err := enc.Encode(pr); err != nil {
			return fmt.Errorf("encoding %s: %w", name, err)
		}
	}
	p.probes = &modeldir.File{Name: name, Bytes: buf.Bytes()}
	return nil
}

// finish renders and validates the spec, reads the vocabulary and stats,
// and decodes the tensors from the files as they will be stored.
func (p *plan) finish(src *stored) error {
	b, err := json.MarshalIndent(p.spec, "", "  ")
	if err != nil {
		return fmt.Errorf("encoding the frozen spec: %w", err)
	}
	p.specBytes = append(b, '\n')
	if _, vs, err := modeldir.ParseSpec(p.specBytes); err != nil {
		return err
	} else if len(vs) > 0 {
		return fmt.Errorf("the frozen spec of %s is invalid (a bug in freeze):\n  %s", src.Ref, strings.Join(vs, "\n  "))
	}
	vocab := p.spec.Inputs.Sparse[0].Vocabulary
	vb, err := src.Raw(vocab)
	if err != nil {
		return fmt.Errorf("reading %s: %w", vocab, err)
	}
	p.vocab = modeldir.File{Name: vocab, Bytes: vb}
	if name := p.spec.Files.Stats; name != "" {
		sb, err := src.Raw(name)
		if err != nil {
			return fmt.Errorf("reading %s: %w", name, err)
		}
		p.stats = &modeldir.File{Name: name, Bytes: sb}
	}
	if p.probes != nil {
		if _, probs := modeldir.ParseProbes(p.probes.Name, p.probes.Bytes, p.spec); len(probs) > 0 {
			return fmt.Errorf("the frozen probes are invalid (a bug in freeze):\n  %s", strings.Join(probs, "\n  "))
		}
	}
	byFile := map[string][]model.Tensor{}
	for _, t := range p.spec.Tensors {
		byFile[t.File] = append(byFile[t.File], t)
	}
	p.tensors = map[string][]float32{}
	var problems []string
	for _, f := range p.tensorFiles {
		ts, probs := modeldir.DecodeTensors(f.Name, f.Bytes, byFile[f.Name])
		problems = append(problems, probs...)
		for k, v := range ts {
			p.tensors[k] = v
		}
	}
	if len(problems) > 0 {
		return fmt.Errorf("the frozen tensors do not match the frozen spec:\n  %s", strings.Join(problems, "\n  "))
	}
	return nil
}

// compareCopy compares a scorer's own copy of its encoder's tensors with
// the named encoder's, layer by layer.
func compareCopy(s, e *model.Spec, side map[string]bool, st, et map[string][]float32) *CopyComparison {
	c := &CopyComparison{}
	for _, l := range s.Layers {
		if !side[l.Name] {
			continue
		}
		el := layerByName(e.Layers, l.Name)
		mine, theirs := layerTensors(l), layerTensors(el)
		for i := range mine {
			if i >= len(theirs) || mine[i][0] != theirs[i][0] {
				continue
			}
			a, b := st[mine[i][1]], et[theirs[i][1]]
			d := TensorDiff{Layer: l.Name, Role: mine[i][0], Tensor: mine[i][1], EncoderTensor: theirs[i][1], Values: len(b)}
			if len(a) != len(b) {
				d.ShapeDiffers = true
				d.Differing = max(len(a), len(b))
			} else {
				for j := range a {
					if math.Float32bits(a[j]) != math.Float32bits(b[j]) {
						d.Differing++
						d.MaxAbs = math.Max(d.MaxAbs, math.Abs(float64(a[j])-float64(b[j])))
					}
				}
			}
			if d.Differing > 0 || d.ShapeDiffers {
				c.Differed = true
				c.MaxAbs = math.Max(c.MaxAbs, d.MaxAbs)
			}
			c.Tensors = append(c.Tensors, d)
		}
	}
	return c
}
