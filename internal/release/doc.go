// Package release is modelgate's release path: signing keys, DSSE-signed
// in-toto statements, approvals, promotion, rollback and the per-tag
// release log.
//
// # Keys
//
// Keys are ed25519. A private key is stored as a PKCS#8 PEM file (mode
// 0600), a public key as a PKIX PEM file; both may carry the holder's name
// on a "modelgate-key-name:" line before the PEM block. A key's id is the
// first 16 hex digits of the sha256 of its public key's PKIX DER encoding
// (KeyID); trust decisions always use the public key itself, the id only
// names it.
//
// # Signed statements
//
// Approvals, release records and signed gate reports are DSSE envelopes
// (payloadType application/vnd.in-toto+json) around an in-toto Statement
// v1 whose predicate type is one of ours under https://modelgate.invalid/.
// Envelopes are stored as artifacts whose subject is the model they speak
// about, so the OCI referrers of a model find them.
//
// # The release log
//
// Every promote and rollback writes a release record naming the previous
// record's manifest digest: a hash chain per tag. The tag
// "release-<tag>" in the same repository (the head pointer) names the
// newest record, so the latest record is found in one lookup. A change of
// a tag is made in this order:
//
//  1. the record is written (it names the current head as previous);
//  2. the model tag is moved by compare-and-swap from the target the
//     record names as "from" (the commit point: losers of a race stop
//     here, exit 3, and leave an unreferenced record);
//  3. the head pointer is moved by compare-and-swap from the previous head
//     to the new record.
//
// A crash between 2 and 3 leaves the tag ahead of the head pointer; the
// next promote or rollback finds the record that moved it (a referrer of
// the tag's target whose previous record is the head) and completes step 3
// before doing its own work, and Log reports the state. Any other
// disagreement between the tag and the head record means the tag was
// moved outside modelgate: Log reports it and promote refuses.
//
// What the compare-and-swap guarantees: on a store with a true CAS (the
// local store's lock, GCS generation preconditions) exactly one of any
// number of concurrent promotes and rollbacks from the same state moves
// the tag; the others change nothing visible and fail with
// errkind.Conflict, and the log stays linear. A registry has no CAS on
// tags (OCI distribution spec): its SwapTag reads, writes and reads back,
// so two processes can both believe they won; the head pointer's own swap
// then usually exposes the loser, and Log reports a tag that disagrees
// with the head record. A store without any TagSwapper is refused.
//
// Rollback reads the head record, which names what undoing it restores
// (Restore: a target and the record whose state that was), so each
// rollback takes a constant number of store operations whatever the length
// of the log (about 17 calls), and successive rollbacks walk back through
// earlier releases like popping a stack; rollback --to is a jump that a
// later plain rollback undoes. Every record also names a "released index"
// blob: the digests ever released on the tag, in order of first release,
// which rollback --to checks in one read. Its size grows with the number
// of distinct models released on the tag (about 72 bytes each), not with
// the number of records; a rollback shares the blob without reading it.
//
// # Who
//
// A record or approval made with a key names the key's holder (the name
// line of the key file) and key id, and carries the public key so the
// signature can be checked without a policy; Log with trusted keys also
// checks the key is one a policy lists. Without a key a record is
// unsigned and names the local user ($USER). For self-approval, "the
// pusher" is whoever signs the promotion: modelgate's push does not record
// an identity, and the person who drives a candidate to production is the
// one whose own approval must not count. A policy that forbids
// self-approval therefore needs promote to be signed.
package release
