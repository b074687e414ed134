// Package modeldir reads and writes model directories: what a training job
// produces and what `modelgate push` reads.
//
// A model directory holds:
//
//	spec.json            the spec (schemas/spec.schema.json)
//	*.safetensors        the tensors, one file per group named by the spec
//	vocabulary file      named by the sparse input: one raw item id per line,
//	                     line i (from 0) is weight row i
//	stats file           optional (spec files.stats): training statistics, a JSON object
//	probes file          optional (spec files.probes): JSON Lines of probe rows, each
//	                     {"items": [...], "values": [...], "dense": {...}, "expect": {layer: [...]}}
//
// Read validates everything it can without running the model and reports
// every problem it finds, each naming its file and place.
package modeldir

import (
	"bufio"
	"bytes"
	"crypto/sha256"
	"encoding/json"
	"errors"
	"fmt"
	"hash/maphash"
	"math"
	"os"
	"runtime"
	"runtime/debug"
	"sort"
	"strconv"
	"strings"
	"unicode/utf8"

	"github.com/modelgate/modelgate/internal/errkind"
	"github.com/modelgate/modelgate/internal/fileio"
	"github.com/modelgate/modelgate/internal/model"
	"github.com/modelgate/modelgate/internal/model/safetensors"
	"github.com/modelgate/modelgate/schemas"
)

// SpecFile is the spec's file name inside a model directory.
const SpecFile = "spec.json"

// Limits on the small files of a model directory (tensors are bounded by the
// safetensors reader and the filesystem).
const (
	MaxSpecSize   = 4 << 20
	MaxStatsSize  = 4 << 20
	MaxProbesSize = 64 << 20
	MaxProbeLine  = 4 << 20
	MaxVocabSize  = 1 << 30
)

// maxTensorFile bounds a tensor file read whole (no real limit: the
// safetensors reader bounds what it allocates).
const maxTensorFile = 1 << 62

// Probe is one probe row: an input given as raw item ids and values, and
// the outputs the training side computed for it, by layer name.
type Probe struct {
	Items  []string             `json:"items"`
	Values []float32            `json:"values"`
	Dense  map[string][]float32 `json:"dense,omitempty"`
	Expect map[string][]float32 `json:"expect"`
}

// UnmarshalJSON accepts item ids given as strings or integers; integers are
// kept in their decimal form.
func (p *Probe) UnmarshalJSON(b []byte) error {
	var raw struct {
		Items  []json.RawMessage    `json:"items"`
		Values []float32            `json:"values"`
		Dense  map[string][]float32 `json:"dense"`
		Expect map[string][]float32 `json:"expect"`
	}
	if err := json.Unmarshal(b, &raw); err != nil {
		return err
	}
	p.Items = make([]string, len(raw.Items))
	for i, it := range raw.Items {
		id, err := ParseItemID(it)
		if err != nil {
			return fmt.Errorf("items[%d]: %w", i, err)
		}
		p.Items[i] = id
	}
	p.Values, p.Dense, p.Expect = raw.Values, raw.Dense, raw.Expect
	return nil
}

// ParseItemID turns a JSON string or integer into a raw item id.
func ParseItemID(raw json.RawMessage) (string, error) {
	raw = bytes.TrimSpace(raw)
	if len(raw) > 0 && raw[0] == '"' {
		var s string
		if err := json.Unmarshal(raw, &s); err != nil {
			return "", err
		}
		if p := model.ItemIDProblem(s); p != "" {
			return "", fmt.Errorf("item id %q: %s", s, p)
		}
		return s, nil
	}
	n, err := strconv.ParseInt(string(raw), 10, 64)
	if err != nil {
		return "", fmt.Errorf("item id %s is neither a string nor an int64", raw)
	}
	return strconv.FormatInt(n, 10), nil
}

// Model is a model directory in memory.
type Model struct {
	Spec *model.Spec
	// Tensors holds every tensor named by the spec, decoded to float32.
	Tensors map[string][]float32
	// Vocabulary lists raw item ids; Vocabulary[i] names weight row i.
	Vocabulary []string
	// Stats is the training statistics object (nil when absent).
	Stats  map[string]any
	Probes []Probe
}

// File is one file of a model directory as read from disk.
type File struct {
	Name  string
	Bytes []byte
	// Size is the file's length; a tensor file checked by CheckHeaders or
	// CheckScanned has only Name and Size (Bytes is nil).
	Size int64
	// sum, when not nil, delivers the sha256 of Bytes computed in the
	// background while the directory is checked (see Sha256).
	sum chan [32]byte
	// digest caches the result of Sha256.
	digest *[32]byte
}

// Sha256 returns the sha256 of the file's bytes. Read and Check start
// hashing tensor files in the background, overlapping it with their
// checks; Sha256 waits for that result or computes it.
func (f *File) Sha256() [32]byte {
	if f.digest != nil {
		return *f.digest
	}
	var d [32]byte
	if f.sum != nil {
		d = <-f.sum
	} else {
		d = sha256.Sum256(f.Bytes)
	}
	f.digest = &d
	return d
}

// hashing returns f with its sha256 computed in the background.
func hashing(name string, b []byte) File {
	ch := make(chan [32]byte, 1)
	go func() { ch <- sha256.Sum256(b) }()
	return File{Name: name, Bytes: b, Size: int64(len(b)), sum: ch}
}

// Dir is a validated model directory: the model and the exact bytes of its
// files, in the order a push stores them (spec first).
type Dir struct {
	Path  string
	Model *Model
	// SpecBytes is spec.json as written.
	SpecBytes []byte
	// TensorFiles, VocabularyFile, StatsFile, ProbesFile hold the raw files.
	TensorFiles    []File
	VocabularyFile File
	StatsFile      *File
	ProbesFile     *File
	// mapped are memory-mapped file contents, released by Close.
	mapped [][]byte
}

// Problems gathers every problem found in a model directory.
type Problems struct {
	Dir  string
	List []string
}

func (p *Problems) add(format string, args ...any) {
	p.List = append(p.List, fmt.Sprintf(format, args...))
}

func (p *Problems) Error() string {
	return fmt.Sprintf("model directory %s has %d problem(s):\n  %s", p.Dir, len(p.List), strings.Join(p.List, "\n  "))
}

func (p *Problems) err() error {
	if len(p.List) == 0 {
		return nil
	}
	return errkind.Wrap(errkind.BadInput, p)
}

// Is lets errors.Is(err, ErrChangedWhileRead) find a problem list in which
// a mapped file shrank while it was checked.
func (p *Problems) Is(target error) bool {
	if target != ErrChangedWhileRead {
		return false
	}
	for _, s := range p.List {
		if strings.Contains(s, changedWhileRead) {
			return true
		}
	}
	return false
}

// ParseSpec validates raw spec JSON against schemas/spec.schema.json and
// the cross-field rules of CheckSpec, returning every violation.
func ParseSpec(raw []byte) (*model.Spec, []string, error) {
	vs, err := schemas.Validate(schemas.Spec, raw)
	if err != nil {
		return nil, nil, err
	}
	if len(vs) > 0 {
		out := make([]string, len(vs))
		for i, v := range vs {
			out[i] = v.String()
		}
		return nil, out, nil
	}
	var s model.Spec
	if err := json.Unmarshal(raw, &s); err != nil {
		return nil, []string{"/: " + err.Error()}, nil
	}
	return &s, CheckSpec(&s), nil
}

// ParseStoredSpec is ParseSpec for a spec read from the store: there a
// scorer names its encoder by digest (a model directory may name it by
// NAME:TAG only; push pins the digest).
func ParseStoredSpec(raw []byte) (*model.Spec, []string, error) {
	s, vs, err := ParseSpec(raw)
	if s != nil && s.Encoder != nil && s.Encoder.Digest == "" {
		vs = append(vs, "/encoder/digest: a stored spec names its encoder by digest")
	}
	return s, vs, err
}

// CheckSpec applies the rules a JSON Schema cannot express: unique names,
// tensors referenced by layers and training state exist, the named output,
// code and reconstruction layers exist.
func CheckSpec(s *model.Spec) []string {
	var out []string
	tensors := map[string]model.Tensor{}
	for i, t := range s.Tensors {
		if _, dup := tensors[t.Name]; dup {
			out = append(out, fmt.Sprintf("/tensors/%d/name: tensor %q is declared twice", i, t.Name))
		}
		tensors[t.Name] = t
	}
	names := map[string]bool{}
	for _, in := range s.Inputs.Sparse {
		names[in.Name] = true
	}
	for i, in := range s.Inputs.Dense {
		if names[in.Name] {
			out = append(out, fmt.Sprintf("/inputs/dense/%d/name: input name %q is used twice", i, in.Name))
		}
		names[in.Name] = true
	}
	layers := map[string]bool{}
	for i, l := range s.Layers {
		if names[l.Name] || layers[l.Name] {
			out = append(out, fmt.Sprintf("/layers/%d/name: name %q is used twice", i, l.Name))
		}
		layers[l.Name] = true
		for _, f := range []struct{ field, name string }{{"weight", l.Weight}, {"tiedTo", l.TiedTo}, {"bias", l.Bias}} {
			if f.name == "" {
				continue
			}
			t, ok := tensors[f.name]
			if !ok {
				out = append(out, fmt.Sprintf("/layers/%d/%s: tensor %q is not declared in /tensors", i, f.field, f.name))
			} else if t.Part == "training" {
				out = append(out, fmt.Sprintf("/layers/%d/%s: tensor %q has part \"training\" and cannot be used by a layer", i, f.field, f.name))
			}
		}
	}
	for _, f := range []struct{ ptr, name string }{{"/output", s.Output}, {"/code", s.Code}, {"/reconstruction", s.Reconstruction}} {
		if f.name != "" && !layers[f.name] {
			out = append(out, fmt.Sprintf("%s: layer %q does not exist", f.ptr, f.name))
		}
	}
	if s.Encoder != nil && s.Encoder.Embedded && !layers[s.Encoder.Output] {
		out = append(out, fmt.Sprintf("/encoder/output: embedded encoder layer %q does not exist", s.Encoder.Output))
	}
	if t := s.Training; t != nil {
		for i, r := range t.Regularization {
			if _, ok := tensors[r.Tensor]; !ok {
				out = append(out, fmt.Sprintf("/training/regularization/%d/tensor: tensor %q is not declared", i, r.Tensor))
			}
		}
		for i, o := range t.OptimizerSlots {
			if _, ok := tensors[o.Tensor]; !ok {
				out = append(out, fmt.Sprintf("/training/optimizerSlots/%d/tensor: tensor %q is not declared", i, o.Tensor))
			}
			if _, ok := tensors[o.Of]; !ok {
				out = append(out, fmt.Sprintf("/training/optimizerSlots/%d/of: tensor %q is not declared", i, o.Of))
			}
		}
		for i, d := range t.Dropout {
			if !layers[d.Layer] {
				out = append(out, fmt.Sprintf("/training/dropout/%d/layer: layer %q does not exist", i, d.Layer))
			}
		}
	}
	return out
}

// TensorFileNames returns the distinct safetensors files the spec names, sorted.
func TensorFileNames(s *model.Spec) []string {
	seen := map[string]bool{}
	var out []string
	for _, t := range s.Tensors {
		if !seen[t.File] {
			seen[t.File] = true
			out = append(out, t.File)
		}
	}
	sort.Strings(out)
	return out
}

// readLimited reads the file name of the model directory dir: a regular
// file, or a symbolic link to one inside dir, of at most limit bytes.
func readLimited(dir, name string, limit int64) ([]byte, error) {
	return fileio.ReadInDir(dir, name, limit)
}

// Read reads and validates the model directory at dir, decoding every
// tensor into Model.Tensors. All problems found are returned together as
// one error of kind BadInput.
func Read(dir string) (*Dir, error) { return read(dir, readOptions{decode: true}) }

// Check is Read without decoding tensors (Model.Tensors stays empty): the
// same validation at a fraction of the memory. Large tensor files are
// mapped into memory rather than read; call Close when done with the Dir's
// bytes.
func Check(dir string) (*Dir, error) { return read(dir, readOptions{mmap: true}) }

// CheckForPush is Check that also hashes the tensor files (File.Sha256)
// in the background while they are checked. It reads the tensor files into
// memory rather than mapping them: the bytes it hashes, checks and hands
// to the upload must stay what was read even if the file is rewritten or
// truncated meanwhile (a mapped file truncated under the process kills it
// with SIGBUS; one rewritten in place would upload other bytes than were
// hashed). The local store does not come here: it streams each file once.
func CheckForPush(dir string) (*Dir, error) { return read(dir, readOptions{hash: true}) }

// CheckHeaders is Check reading only the header of each tensor file
// (names, dtypes and shapes against the spec; values are not looked at).
// Its TensorFiles have Name and Size only. A push uses it before streaming
// the tensor files into the store through a safetensors.Scanner, then
// finishes the check with Dir.CheckScans.
func CheckHeaders(dir string) (*Dir, error) { return read(dir, readOptions{headers: true}) }

// CheckScanned is Check taking each tensor file's check from scans (keyed
// by file name), Scanners that saw the files' bytes as they were written;
// those tensor files are not read again (a file without a scan is read and
// checked as Check does). Its scanned TensorFiles have Name and Size only.
// A pull uses it on the directory it has just written.
func CheckScanned(dir string, scans map[string]*safetensors.Scanner) (*Dir, error) {
	return read(dir, readOptions{mmap: true, scans: scans})
}

type readOptions struct {
	decode, mmap, hash, headers bool
	scans                       map[string]*safetensors.Scanner
}

// Close releases memory-mapped files; the Dir's file bytes must not be
// used afterwards. It is a no-op for a Dir from Read.
func (d *Dir) Close() error {
	var first error
	for _, m := range d.mapped {
		if err := unmap(m); err != nil && first == nil {
			first = err
		}
	}
	d.mapped = nil
	return first
}

func read(dir string, opt readOptions) (*Dir, error) {
	probs := &Problems{Dir: dir}
	st, err := os.Stat(dir)
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "model directory %s: %w", dir, err)
	}
	if !st.IsDir() {
		return nil, errkind.New(errkind.BadInput, "model directory %s: not a directory", dir)
	}
	specBytes, err := readLimited(dir, SpecFile, MaxSpecSize)
	if err != nil {
		return nil, errkind.New(errkind.BadInput, "model directory %s: reading %s: %w", dir, SpecFile, err)
	}
	spec, vs, err := ParseSpec(specBytes)
	if err != nil {
		return nil, err
	}
	for _, v := range vs {
		probs.add("%s %s", SpecFile, v)
	}
	if spec == nil || len(vs) > 0 {
		return nil, probs.err()
	}
	d := &Dir{Path: dir, SpecBytes: specBytes, Model: &Model{Spec: spec, Tensors: map[string][]float32{}}}
	d.readTensors(probs, opt)
	d.readVocabulary(probs)
	d.readStats(probs)
	d.readProbes(probs)
	if err := probs.err(); err != nil {
		d.Close()
		return nil, err
	}
	return d, nil
}

func declaredByFile(spec *model.Spec) map[string][]model.Tensor {
	byFile := map[string][]model.Tensor{}
	for _, t := range spec.Tensors {
		byFile[t.File] = append(byFile[t.File], t)
	}
	return byFile
}

func (d *Dir) readTensors(probs *Problems, opt readOptions) {
	spec := d.Model.Spec
	byFile := declaredByFile(spec)
	for _, name := range TensorFileNames(spec) {
		sc, scanned := opt.scans[name]
		switch {
		case scanned:
			d.TensorFiles = append(d.TensorFiles, File{Name: name, Size: sc.Size()})
			probs.List = append(probs.List, ScanProblems(name, sc, byFile[name])...)
			continue
		case opt.headers:
			size, problems := checkHeader(d.Path, name, byFile[name])
			d.TensorFiles = append(d.TensorFiles, File{Name: name, Size: size})
			probs.List = append(probs.List, problems...)
			continue
		}
		var b []byte
		var err error
		var mapped bool
		if opt.mmap {
			b, mapped, err = mapFile(d.Path, name)
			if mapped {
				d.mapped = append(d.mapped, b)
			}
		} else {
			b, err = readLimited(d.Path, name, maxTensorFile)
		}
		if err != nil {
			probs.add("%s: %v", name, err)
			continue
		}
		if opt.hash {
			d.TensorFiles = append(d.TensorFiles, hashing(name, b))
		} else {
			d.TensorFiles = append(d.TensorFiles, File{Name: name, Bytes: b, Size: int64(len(b))})
		}
		var tensors map[string][]float32
		var problems []string
		if mapped {
			tensors, problems = checkMapped(name, b, byFile[name], opt.decode)
		} else {
			tensors, problems = checkTensors(name, b, byFile[name], opt.decode)
		}
		probs.List = append(probs.List, problems...)
		for k, v := range tensors {
			d.Model.Tensors[k] = v
		}
	}
}

// checkHeader parses the header of the tensor file file of dir and compares it
// with the declared tensors; it returns the file's size.
func checkHeader(dir, file string, declared []model.Tensor) (int64, []string) {
	f, st, err := fileio.OpenInDir(dir, file)
	if err != nil {
		return 0, []string{fmt.Sprintf("%s: %v", file, err)}
	}
	defer f.Close()
	sf, err := safetensors.Parse(f, st.Size())
	if err != nil {
		return st.Size(), []string{fmt.Sprintf("%s: %v", file, err)}
	}
	return st.Size(), tensorProblems(file, sf, declared, nil)
}

// ScanProblems lists what is wrong with a tensor file that streamed past
// sc: an invalid header, tensors that differ from the declared ones, and
// NaN or infinite values.
func ScanProblems(file string, sc *safetensors.Scanner, declared []model.Tensor) []string {
	f, nonFinite, err := sc.Result()
	if err != nil {
		return []string{fmt.Sprintf("%s: %v", file, err)}
	}
	return tensorProblems(file, f, declared, nonFinite)
}

// CheckScans finishes a check begun by CheckHeaders: scans (keyed by file
// name) saw the tensor files' bytes as they were streamed, and every
// problem they show is returned together, as an error of kind BadInput.
func (d *Dir) CheckScans(scans map[string]*safetensors.Scanner) error {
	probs := &Problems{Dir: d.Path}
	byFile := declaredByFile(d.Model.Spec)
	for _, name := range TensorFileNames(d.Model.Spec) {
		sc, ok := scans[name]
		if !ok {
			probs.add("%s: was not scanned", name)
			continue
		}
		probs.List = append(probs.List, ScanProblems(name, sc, byFile[name])...)
	}
	return probs.err()
}

// tensorProblems compares a file's header with the declared tensors;
// nonFinite (nil when values were not looked at) holds the flat index of
// each tensor's first NaN or infinity.
func tensorProblems(file string, f *safetensors.File, declared []model.Tensor, nonFinite map[string]int64) []string {
	var problems []string
	want := map[string]bool{}
	for _, t := range declared {
		want[t.Name] = true
		info, ok := f.Info(t.Name)
		if !ok {
			problems = append(problems, fmt.Sprintf("%s: tensor %q declared in spec.json is missing", file, t.Name))
			continue
		}
		if info.DType != t.DType {
			problems = append(problems, fmt.Sprintf("%s: tensor %q has dtype %s, spec.json says %s", file, t.Name, info.DType, t.DType))
		}
		if !equalInts(info.Shape, t.Shape) {
			problems = append(problems, fmt.Sprintf("%s: tensor %q has shape %v, spec.json says %v", file, t.Name, info.Shape, t.Shape))
			continue
		}
		if i, bad := nonFinite[t.Name]; bad {
			problems = append(problems, fmt.Sprintf("%s: tensor %q has a non-finite value at flat index %d", file, t.Name, i))
		}
	}
	for _, info := range f.Tensors {
		if !want[info.Name] {
			problems = append(problems, fmt.Sprintf("%s: tensor %q is not declared in spec.json", file, info.Name))
		}
	}
	return problems
}

// DecodeTensors parses one safetensors file and checks it against the
// spec's tensors declared in it: same names, dtype, shape, all values
// finite. It returns the decoded tensors and every problem found.
func DecodeTensors(file string, b []byte, declared []model.Tensor) (map[string][]float32, []string) {
	return decodeTensors(file, b, declared, safetensors.Decode)
}

// DecodeTensorsShared is DecodeTensors for a caller that hands b over: F32
// tensors may be views of b instead of copies (safetensors.DecodeShared),
// so b must stay unchanged and alive (not unmapped) while they are used.
// A model loaded from a store needs half the memory this way.
func DecodeTensorsShared(file string, b []byte, declared []model.Tensor) (map[string][]float32, []string) {
	return decodeTensors(file, b, declared, safetensors.DecodeShared)
}

// CheckTensors is DecodeTensors without keeping the decoded values: it
// checks finiteness on the stored bytes, allocating nothing per element.
func CheckTensors(file string, b []byte, declared []model.Tensor) []string {
	_, problems := checkTensors(file, b, declared, false)
	return problems
}

// ErrChangedWhileRead marks a problem list that includes a mapped tensor
// file which shrank while it was being checked (errors.Is finds it).
var ErrChangedWhileRead = errors.New("a file changed while it was read")

// checkMapped is checkTensors on a memory-mapped file. A file truncated
// while it is mapped faults on the pages past its new end (SIGBUS), which
// would kill the process; here the fault becomes a panic (see
// runtime/debug.SetPanicOnFault), recovered into a problem that names the
// file. Only this goroutine reads the mapping while it is checked.
func checkMapped(file string, b []byte, declared []model.Tensor, decode bool) (tensors map[string][]float32, problems []string) {
	defer debug.SetPanicOnFault(debug.SetPanicOnFault(true))
	defer func() {
		r := recover()
		if r == nil {
			return
		}
		// A memory fault carries the faulting address (runtime/debug.SetPanicOnFault).
		if fault, ok := r.(interface {
			runtime.Error
			Addr() uintptr
		}); ok {
			tensors, problems = nil, []string{fmt.Sprintf("%s: %s (fault at %#x)", file, changedWhileRead, fault.Addr())}
			return
		}
		panic(r)
	}()
	return checkTensors(file, b, declared, decode)
}

// changedWhileRead is the text of a problem checkMapped recovered.
const changedWhileRead = "changed while it was read: the file shrank under the check; check again once it is written"

func checkTensors(file string, b []byte, declared []model.Tensor, decode bool) (map[string][]float32, []string) {
	if decode {
		return decodeTensors(file, b, declared, safetensors.Decode)
	}
	sc := safetensors.NewScanner(int64(len(b)))
	sc.Write(b)
	return nil, ScanProblems(file, sc, declared)
}

func decodeTensors(file string, b []byte, declared []model.Tensor, decode func(string, []byte) []float32) (map[string][]float32, []string) {
	f, err := safetensors.Parse(bytes.NewReader(b), int64(len(b)))
	if err != nil {
		return nil, []string{fmt.Sprintf("%s: %v", file, err)}
	}
	problems := tensorProblems(file, f, declared, nil)
	out := map[string][]float32{}
	for _, t := range declared {
		info, ok := f.Info(t.Name)
		if !ok || !equalInts(info.Shape, t.Shape) {
			continue // reported by tensorProblems
		}
		// Decoded straight from b (Float32s would copy the bytes first).
		vals := decode(info.DType, b[f.DataOffset()+info.Begin:f.DataOffset()+info.End])
		if i, bad := firstNonFinite(vals); bad {
			problems = append(problems, fmt.Sprintf("%s: tensor %q has a non-finite value (%v) at flat index %d", file, t.Name, vals[i], i))
			continue
		}
		out[t.Name] = vals
	}
	return out, problems
}

func firstNonFinite(v []float32) (int, bool) {
	for i, x := range v {
		if math.IsNaN(float64(x)) || math.IsInf(float64(x), 0) {
			return i, true
		}
	}
	return 0, false
}

func equalInts(a, b []int) bool {
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

func (d *Dir) readVocabulary(probs *Problems) {
	in := d.Model.Spec.Inputs.Sparse[0]
	b, err := readLimited(d.Path, in.Vocabulary, MaxVocabSize)
	if err != nil {
		probs.add("%s: %v", in.Vocabulary, err)
		return
	}
	d.VocabularyFile = File{Name: in.Vocabulary, Bytes: b}
	ids, problems := ParseVocabulary(in.Vocabulary, b, in.VocabularySize)
	probs.List = append(probs.List, problems...)
	d.Model.Vocabulary = ids
}

// ParseVocabulary splits a vocabulary file into ids and checks it: valid
// UTF-8, every id well formed (model.ItemIDProblem: so no CR, control
// character, white space at either end, non-NFC spelling or non-canonical
// integer), no duplicate ids, exactly size lines.
func ParseVocabulary(file string, b []byte, size int) ([]string, []string) {
	var problems []string
	if !utf8.Valid(b) {
		return nil, []string{file + ": not valid UTF-8"}
	}
	if bytes.HasPrefix(b, []byte("\xef\xbb\xbf")) {
		// The holdout side (internal/data) refuses it too: it would become
		// part of the first id.
		return nil, []string{file + ":1: starts with a byte-order mark"}
	}
	text := strings.TrimSuffix(string(b), "\n")
	var ids []string
	if text != "" {
		ids = strings.Split(text, "\n")
	}
	// A map of every id costs more than the rest of the check together; a
	// sorted list of 64-bit hashes finds that no id repeats, and only when
	// two hashes are equal does the map walk name the lines.
	var seen map[string]int
	if mayRepeat(ids) {
		seen = make(map[string]int, len(ids))
	}
	for i, id := range ids {
		switch p := model.ItemIDProblem(id); {
		case p != "":
			problems = append(problems, fmt.Sprintf("%s:%d: item id %q: %s", file, i+1, id, p))
		case seen != nil:
			if j, dup := seen[id]; dup {
				problems = append(problems, fmt.Sprintf("%s:%d: item id %q repeats line %d", file, i+1, id, j+1))
			}
			seen[id] = i
		}
		if len(problems) >= 20 {
			problems = append(problems, file+": more problems not listed")
			return ids, problems
		}
	}
	if len(ids) != size {
		problems = append(problems, fmt.Sprintf("%s: %d ids, spec.json vocabularySize says %d", file, len(ids), size))
	}
	return ids, problems
}

// mayRepeat reports whether two ids might be equal: false means they are
// all different; true means two have the same 64-bit hash. The hashes go
// into an open-addressing set at most half full; zero marks a free slot, so
// every hash gets its lowest bit set (two hashes differing only there give
// a false alarm, which costs the map walk and nothing else).
func mayRepeat(ids []string) bool {
	size := 16
	for size < 2*len(ids) {
		size *= 2
	}
	set := make([]uint64, size)
	seed := maphash.MakeSeed()
	for _, id := range ids {
		h := maphash.String(seed, id) | 1
		for i := h & uint64(size-1); ; i = (i + 1) & uint64(size-1) {
			if set[i] == 0 {
				set[i] = h
				break
			}
			if set[i] == h {
				return true
			}
		}
	}
	return false
}

func (d *Dir) readStats(probs *Problems) {
	name := d.Model.Spec.Files.Stats
	if name == "" {
		return
	}
	b, err := readLimited(d.Path, name, MaxStatsSize)
	if err != nil {
		probs.add("%s: %v", name, err)
		return
	}
	d.StatsFile = &File{Name: name, Bytes: b}
	if err := json.Unmarshal(b, &d.Model.Stats); err != nil || d.Model.Stats == nil {
		probs.add("%s: not a JSON object: %v", name, err)
	}
}

func (d *Dir) readProbes(probs *Problems) {
	name := d.Model.Spec.Files.Probes
	if name == "" {
		return
	}
	b, err := readLimited(d.Path, name, MaxProbesSize)
	if err != nil {
		probs.add("%s: %v", name, err)
		return
	}
	d.ProbesFile = &File{Name: name, Bytes: b}
	ps, problems := ParseProbes(name, b, d.Model.Spec)
	probs.List = append(probs.List, problems...)
	d.Model.Probes = ps
}

// ParseProbes parses a probes file (JSON Lines) and checks each row's shape
// against the spec: items and values of equal length, finite values,
// dense inputs of the declared sizes, expected outputs for existing layers.
func ParseProbes(file string, b []byte, s *model.Spec) ([]Probe, []string) {
	var problems []string
	dense := map[string]int{}
	for _, in := range s.Inputs.Dense {
		dense[in.Name] = in.Size
	}
	layers := map[string]bool{}
	for _, l := range s.Layers {
		layers[l.Name] = true
	}
	sc := bufio.NewScanner(bytes.NewReader(b))
	sc.Buffer(make([]byte, 64<<10), MaxProbeLine)
	var out []Probe
	line := 0
	for sc.Scan() {
		line++
		text := bytes.TrimSpace(sc.Bytes())
		if len(text) == 0 {
			continue
		}
		var p Probe
		if err := json.Unmarshal(text, &p); err != nil {
			problems = append(problems, fmt.Sprintf("%s:%d: %v", file, line, err))
			continue
		}
		if len(p.Items) != len(p.Values) {
			problems = append(problems, fmt.Sprintf("%s:%d: %d items but %d values", file, line, len(p.Items), len(p.Values)))
		}
		for _, v := range p.Values {
			if math.IsNaN(float64(v)) || math.IsInf(float64(v), 0) || v < 0 {
				problems = append(problems, fmt.Sprintf("%s:%d: value %v is negative or not finite", file, line, v))
				break
			}
		}
		for name, size := range dense {
			if got := len(p.Dense[name]); got != size {
				problems = append(problems, fmt.Sprintf("%s:%d: dense input %q has %d values, spec.json says %d", file, line, name, got, size))
			}
		}
		for name := range p.Dense {
			if _, ok := dense[name]; !ok {
				problems = append(problems, fmt.Sprintf("%s:%d: dense input %q is not in spec.json", file, line, name))
			}
		}
		if len(p.Expect) == 0 {
			problems = append(problems, fmt.Sprintf("%s:%d: no expected outputs (\"expect\")", file, line))
		}
		for name := range p.Expect {
			if !layers[name] && !strings.HasPrefix(name, model.EncoderPrefix) {
				problems = append(problems, fmt.Sprintf("%s:%d: expected output for unknown layer %q", file, line, name))
			}
		}
		out = append(out, p)
		if len(problems) >= 50 {
			return out, append(problems, file+": more problems not listed")
		}
	}
	if err := sc.Err(); err != nil {
		problems = append(problems, fmt.Sprintf("%s:%d: %v", file, line+1, err))
	}
	return out, problems
}
