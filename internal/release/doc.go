// Package release is modelgate's release path: signing keys, DSSE-signed
// in-toto statements, approvals, promotion, rollback and the per-tag
// release log.
//
// # Keys
//
// Keys are ed25519. A private key is stored as a PKCS#8 PEM file (mode
// 0600), a public key as a PKIX (SPKI) PEM file: standard PEM, nothing
// before or after the block. The holder's name is the policy's; files of
// the deprecated form with a "modelgate-key-name:" line before the block
// are still read. A key is read from env:VAR, file:PATH, a path or "-"
// (standard input): ReadKeySource. A key's id is the
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
// # Encoders, scorers and releases of several tags
//
// A scorer's spec pins the encoder whose code it reads. An encoder tag
// whose live target a live scorer consumes (Dependents: by reverse
// lineage over the tags with a release log, and through scorer rules whose
// freeze.encoderTag names the encoder tag) moves only together with those
// scorers, each to a scorer of the new encoder; a scorer tied to an
// encoder tag must consume what that tag points at after the release.
//
// PromoteUnit moves several tags as one release. One signed statement
// (subjects: every new model) carries a Record whose Unit lists every
// move; each tag's log holds its own copy (a manifest in that tag's
// repository with the same envelope and that tag's released index),
// chained to that tag's previous record and read as that tag's entry. A
// unit is applied in steps, each a compare-and-swap from the state the
// record names, so any process can take it further (advanceUnit):
//
//  1. the copies are written (nothing visible);
//  2. each tag's head pointer is claimed, in move order, from its previous
//     record to its copy; a head found moved by another release before
//     any tag moved gives the claimed heads back (exit 3, nothing changed);
//  3. each tag moves, scorers first and the encoder last: a scorer pins
//     its encoder by digest, so whoever loads a scorer whole stays right at
//     every step, and the shared encoder moves once its scorers are there;
//  4. each copy gets its committed marker.
//
// A tag whose head is a copy whose tag has not moved (or whose marker is
// missing) is "open": promote, rollback and Initial complete it first, and
// Log reports "interrupted" naming the tags still to move. Rolling back
// any tag whose newest record is a unit's rolls the whole unit back, as a
// unit record again.
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
