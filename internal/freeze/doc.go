// Package freeze turns a scorer that uses an encoder into one
// self-contained artifact whose encoder part is constants, and proves the
// conversion changed nothing it should not.
//
// A frozen scorer (Scorer) is a scorer artifact whose spec has
// encoder.embedded true and lineage.frozenFrom set to the source scorer's
// digest, and whose encoder tensors are the named encoder artifact's own
// safetensors blobs, shared by digest: the store holds those bytes once,
// however many scorers are frozen on the encoder. Every tensor of a shared
// blob is declared in the frozen spec with the part the encoder gives it
// (a decoder bias stored beside the encoder weight is declared, with part
// "decoder", though no layer of the scorer uses it). Training-only state is
// stripped and listed: trainable flags, optimizer slot tensors (and files
// left empty by their removal), regularisation terms, dropout.
//
// Names. The encoder's layer and tensor names are kept as the encoder
// gives them: its tensor names are fixed by the shared blob, and keeping
// its layer names lets anyone map an embedded layer to the named encoder's
// layer by name (Verify does). A scorer layer, tensor or file whose name
// clashes with the encoder's is renamed instead, and the rename reported.
// A scorer's "encoder/<x>" references become "<x>".
//
// Lineage. lineage.frozenFrom is the source scorer's digest; the manifest
// annotations name it (dev.modelgate.frozen-from), the encoder digest, the
// tool version and the storage. The rest of the lineage, creation time
// included, is the source's, so freezing is deterministic: the same source,
// encoder, storage and tool version give the same frozen digest.
//
// Storage. With Options.Storage f16 or bf16 only the head's tensors are
// converted (round to nearest, ties to even). The encoder stays as its
// artifact stores it: converting it would make a new blob, no longer
// shared and no longer byte-identical to the encoder version the spec
// names, which the gate's freeze check requires. A reduced-precision
// encoder is its own encoder version, published and gated as such, and
// scorers are frozen against it.
//
// Verification. The frozen scorer's output is compared with the unfrozen
// composition — the named encoder run on its own (from the encoder
// artifact), then the source scorer's head fed with the encoder's outputs
// — on the probe rows and on an optional holdout sample: bit for bit
// (math.Float32bits) for float32 storage, within Options.MaxError for
// f16/bf16. The result is stored as a freeze record, a report artifact
// (artifactType application/vnd.modelgate.report.v1, annotation
// dev.modelgate.report.type=freeze, the record JSON as its config blob of
// media type application/vnd.modelgate.freeze-record.v1+json) whose
// subject is the frozen scorer.
// Verify re-runs the same test on a stored scorer, for the gate.
package freeze
