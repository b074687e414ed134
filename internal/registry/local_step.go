package registry

// stepHook, when set (only by this package's tests, before any store is
// opened), is called at each step boundary of a write to a local store:
// a temporary file written, synced, renamed into place, its folder synced.
// The killed-writer test sends its own process SIGKILL from it after the
// step it chooses, so that every kind of step is interrupted exactly
// rather than wherever a timer happens to land.
var stepHook func(step string)

// Step names passed to stepHook.
const (
	stepBlobWritten = "blob-written" // a staged blob's temporary file holds all its bytes
	stepBlobSynced  = "blob-synced"  // ... and is synced
	stepBlobRenamed = "blob-renamed" // ... and has its final name
	stepFileWritten = "file-written" // a small file's (index, side file) temporary file is written
	stepFileSynced  = "file-synced"  // ... and synced (durable writes)
	stepFileRenamed = "file-renamed" // ... and has its final name
	stepDirSynced   = "dir-synced"   // ... and its folder is synced (durable writes)
)

func step(name string) {
	if stepHook != nil {
		stepHook(name)
	}
}
