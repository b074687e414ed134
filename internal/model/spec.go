// Package model holds the model spec (the JSON description of an encoder or
// a scorer), the model directory format that training jobs write and
// `push` reads, and tensor I/O.
package model

// Kinds of model.
const (
	KindEncoder = "encoder"
	KindScorer  = "scorer"
)

// Value transforms applied to a sparse input's values before the first layer.
const (
	TransformIdentity = "identity"
	TransformLog1p    = "log1p"
	TransformBinary   = "binary"
)

// Rules for an index that appears more than once in one row.
const (
	DuplicatesSum    = "sum"    // values are added before the transform
	DuplicatesMax    = "max"    // the largest value is kept
	DuplicatesRefuse = "refuse" // the row is refused
)

// Rules for a raw item id that the vocabulary does not know.
const (
	UnknownBucket = "bucket" // mapped to the unknown bucket row
	UnknownDrop   = "drop"   // the pair is dropped
	UnknownRefuse = "refuse" // the row is refused
)

// Layer operations.
const (
	OpSparseDense = "sparse_dense" // sparse input × dense weight [rows, out] (+ bias)
	OpDense       = "dense"        // input × weight [in, out] (+ bias)
	OpConcat      = "concat"       // concatenation of inputs in order
	OpTiedDecoder = "tied_decoder" // input × transpose(weight of another layer) (+ bias)
)

// Activations.
const (
	ActIdentity = "identity"
	ActReLU     = "relu"
	ActSigmoid  = "sigmoid"
	ActTanh     = "tanh"
)

// Which side of a request a dense input describes: one request scores one
// user against many candidate items.
const (
	DescribesUser = "user"
	DescribesItem = "item"
)

// EncoderPrefix prefixes, in a scorer's layer inputs, the names of layers
// that belong to the encoder it uses ("encoder/code").
const EncoderPrefix = "encoder/"

// Spec is a model's JSON description: the manifest's config blob.
// The JSON Schema in schemas/spec.schema.json is the authority on which
// documents are valid; Validate adds the cross-field rules a schema cannot
// express.
type Spec struct {
	SchemaVersion int      `json:"schemaVersion"`
	Kind          string   `json:"kind"`
	Name          string   `json:"name"`
	Description   string   `json:"description,omitempty"`
	Inputs        Inputs   `json:"inputs"`
	Tensors       []Tensor `json:"tensors"`
	Layers        []Layer  `json:"layers"`
	// Code names the encoder's code layer (encoders only).
	Code string `json:"code,omitempty"`
	// Reconstruction names an encoder's decoder output layer, if any.
	Reconstruction string `json:"reconstruction,omitempty"`
	// Output names the layer whose values are the model's output: the
	// probability for a scorer, the code for an encoder without decoder.
	Output string `json:"output"`
	// Encoder is the encoder a scorer uses (scorers only).
	Encoder *EncoderRef `json:"encoder,omitempty"`
	// Training lists state that only matters while training and that an
	// exporter left attached: regularisation terms, optimizer slots, dropout.
	Training *TrainingState `json:"training,omitempty"`
	Lineage  Lineage        `json:"lineage"`
	// Files names the other files of the model directory.
	Files Files `json:"files,omitempty"`
}

// Inputs are the model's sparse and dense inputs.
type Inputs struct {
	Sparse []SparseInput `json:"sparse"`
	Dense  []DenseInput  `json:"dense,omitempty"`
}

// SparseInput is a per-row bag of (item id, value) pairs.
type SparseInput struct {
	Name string `json:"name"`
	// VocabularySize is the number of known ids; rows 0..VocabularySize-1 of
	// the first layer's weight belong to them, row VocabularySize to the
	// unknown bucket when Unknown is "bucket".
	VocabularySize int    `json:"vocabularySize"`
	Unknown        string `json:"unknown"`
	Transform      string `json:"transform"`
	Duplicates     string `json:"duplicates"`
	// Vocabulary names the model directory's vocabulary file: UTF-8 text,
	// one raw item id per line, line i (from 0) naming weight row i.
	Vocabulary string `json:"vocabulary"`
}

// Rows is the number of weight rows the input needs: the vocabulary plus
// the unknown bucket when there is one.
func (s SparseInput) Rows() int {
	if s.Unknown == UnknownBucket {
		return s.VocabularySize + 1
	}
	return s.VocabularySize
}

// DenseInput is a fixed-width vector of float features.
type DenseInput struct {
	Name      string `json:"name"`
	Size      int    `json:"size"`
	Describes string `json:"describes"`
}

// Tensor describes one stored tensor.
type Tensor struct {
	Name  string `json:"name"`
	File  string `json:"file"`
	Shape []int  `json:"shape"`
	// DType is the storage type: F32, F16 or BF16. The runtime computes in float32.
	DType string `json:"dtype"`
	// Trainable is true when the exporter left the tensor as a variable.
	Trainable bool `json:"trainable"`
	// Part says which part of the model the tensor belongs to: "encoder",
	// "decoder", "head" or "training" (optimizer slots and other state
	// only training needs).
	Part string `json:"part"`
}

// Layer is one step of the forward pass.
type Layer struct {
	Name   string   `json:"name"`
	Op     string   `json:"op"`
	Input  string   `json:"input,omitempty"`
	Inputs []string `json:"inputs,omitempty"`
	// Weight names a tensor; for tied_decoder, TiedTo names the encoder
	// tensor used transposed and Weight is empty.
	Weight     string `json:"weight,omitempty"`
	TiedTo     string `json:"tiedTo,omitempty"`
	Bias       string `json:"bias,omitempty"`
	Activation string `json:"activation,omitempty"`
}

// EncoderRef is a scorer's use of an encoder.
type EncoderRef struct {
	// Name is a human hint (repository:tag) of where the encoder came from.
	Name string `json:"name,omitempty"`
	// Digest is the encoder artifact's manifest digest.
	Digest string `json:"digest"`
	// Embedded is true when the encoder's tensors travel inside the scorer
	// (after freeze, or when the exporter copied them); false when the
	// runtime must fetch the encoder by digest.
	Embedded bool `json:"embedded"`
	// Output names the encoder layer the scorer consumes (normally its code).
	Output string `json:"output"`
}

// TrainingState is state that an exporter left attached and that serving
// must not carry.
type TrainingState struct {
	Regularization []Regularizer   `json:"regularization,omitempty"`
	OptimizerSlots []OptimizerSlot `json:"optimizerSlots,omitempty"`
	Dropout        []Dropout       `json:"dropout,omitempty"`
}

// Regularizer is a penalty term on a tensor.
type Regularizer struct {
	Tensor string  `json:"tensor"`
	Type   string  `json:"type"` // l1, l2
	Weight float64 `json:"weight"`
}

// OptimizerSlot is an optimizer's per-tensor state stored as a tensor.
type OptimizerSlot struct {
	Tensor string `json:"tensor"` // the slot tensor
	Of     string `json:"of"`     // the tensor it belongs to
	Slot   string `json:"slot"`   // e.g. "m", "v", "momentum"
}

// Dropout on a layer's output (identity at inference).
type Dropout struct {
	Layer string  `json:"layer"`
	Rate  float64 `json:"rate"`
}

// Lineage says where a model came from.
type Lineage struct {
	TrainingData     string `json:"trainingData,omitempty"` // sha256:… digest of the training data
	SourceRepository string `json:"sourceRepository,omitempty"`
	SourceCommit     string `json:"sourceCommit,omitempty"`
	CreatedBy        string `json:"createdBy,omitempty"`
	// Created is when training produced the model (RFC 3339, UTC); it
	// becomes the artifact's org.opencontainers.image.created annotation.
	Created string `json:"created,omitempty"`
	// FrozenFrom is the digest of the scorer a frozen scorer was made from.
	FrozenFrom string `json:"frozenFrom,omitempty"`
}

// Files names the model directory's files other than spec.json, the
// safetensors files named by the tensors and the vocabulary.
type Files struct {
	Stats  string `json:"stats,omitempty"`
	Probes string `json:"probes,omitempty"`
}
