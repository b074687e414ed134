// Package data reads holdout files into the sparse row batches the
// reference runtime consumes, parses vocabularies, and writes holdout and
// predictions files.
//
// # Holdout schema
//
// A holdout is a Parquet file or a JSON Lines file (UTF-8, one JSON object
// per line, lines ending in "\n" or "\r\n", the last line's end optional).
// One row is one user: the sparse input as a bag of (item id, value) pairs,
// the dense inputs, and the outcome. Columns (Parquet) and fields (JSON
// Lines) have the same names:
//
//	items    required  list of raw item ids: strings, or integers (int32 or
//	                   int64 in Parquet; JSON integers such as 42 or -7,
//	                   which may be mixed with strings in one list). An
//	                   integer id is looked up by its decimal form, so 42
//	                   and "42" are the same id. An empty string, null, a
//	                   number with a fraction or exponent (1.5, 1e3) and an
//	                   integer beyond int64 are refused, as is a string id
//	                   the vocabulary lacks that breaks the item id rule
//	                   (model.ItemIDProblem: a control character, white
//	                   space at either end, not NFC, or digits that are not
//	                   an int64's canonical form such as "07"). Ids the vocabulary
//	                   does not know follow the spec's unknown rule: bucket
//	                   (weight row vocabularySize), drop (the pair is left
//	                   out) or refuse (the row is refused).
//	values   required  list of numbers, one per item, in the same order:
//	                   float or double (integers also accepted in Parquet;
//	                   any JSON number). Kept as float32; neither the
//	                   spec's transform nor its duplicates rule is applied
//	                   here. Negative, NaN, infinite or beyond-float32
//	                   values and nulls are refused.
//	<dense>  required  one per dense input of the spec, named as the input:
//	                   a list of exactly size numbers, finite; when size is
//	                   1 a single number is accepted too.
//	label    see below 0 or 1: integer, float, double or boolean (JSON: 0,
//	                   1, 0.0, 1.0, true, false).
//	weight   optional  a finite number >= 0 (default 1).
//	slice    optional  a string naming the row's slice for per-slice
//	                   results (default "").
//	row_id   optional  an integer (int32 or int64 in Parquet; a JSON
//	                   integer) identifying the row in predictions and
//	                   reports (default: the row's 0-based position in the
//	                   file).
//
//	<cluster> optional one column, named by the reader's Options.ClusterColumn
//	                   (declared at holdout push or in the policy): a string
//	                   or an integer naming the cluster a row belongs to,
//	                   typically the listener of listener × show rows.
//	                   Required on every row when named; an integer and
//	                   its decimal string are one cluster. Frame.Clusters
//	                   holds each row's ClusterKey.
//
// Labels: a file either has labels on every row or on none. In Parquet the
// label column decides; in JSON Lines the first row does. A reader asked to
// require labels refuses a file without them. An explicit null label is
// refused. For weight, slice and row_id a null means the default.
//
// Parquet details: each column is a top-level field. A list may be the
// standard three-level LIST (as pyarrow and parquet-go write it), a legacy
// two-level list or a bare repeated field: any chain of single-field groups
// with exactly one repeated level above one primitive leaf. Lists and
// elements may be optional, but a null list or a null element is refused
// (an empty list is fine: the row with no activity). A scalar may be
// required or optional. Integers may carry a signed or unsigned INT
// annotation (an unsigned 64-bit value beyond int64 is refused); numbers
// with other logical types (decimal, date, time, timestamp) are refused;
// strings are BYTE_ARRAY with the STRING or ENUM annotation or none. Other
// columns (for example a pandas index) are ignored and never read, except
// that with Options.EveryColumn (push) every column must have one of those
// two shapes, whatever its type: a struct, a map, a list of structs or a
// list of lists is refused, naming the column. The file
// is read one page per column at a time; the row number of a Parquet row
// counts from 1 across row groups.
//
// JSON Lines details: an empty line is refused, as is a line longer than
// MaxLineBytes, a field given twice, a string that is not valid UTF-8 or
// holds an unpaired UTF-16 surrogate escape, and anything after the object
// on its line. A UTF-8 byte order mark before the first line is ignored.
// Other fields are ignored. The row number of a JSON Lines row is its line
// number.
//
// Example line:
//
//	{"row_id":17,"items":["ep-1042",88213,"ep-7"],"values":[3,1,2],"listener_age":[0.31],"label":1,"slice":"new-listener"}
//
// Errors name the file and the 1-based row number.
//
// # Vocabulary file
//
// UTF-8 text, one raw item id per line, line i (from 0) naming weight row
// i; see ParseVocabulary.
package data
