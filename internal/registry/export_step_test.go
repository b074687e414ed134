package registry

// SetStepHook sets the function a local store calls at each step boundary
// of its writes (tests only; see stepHook).
func SetStepHook(f func(step string)) { stepHook = f }

// WriteSteps are the step names a local store passes to the hook.
var WriteSteps = []string{stepBlobWritten, stepBlobSynced, stepBlobRenamed, stepFileWritten, stepFileSynced, stepFileRenamed, stepDirSynced}

// SetScrubListedHook sets the hook Scrub runs between listing the blobs
// and reading the side files (nil removes it).
func SetScrubListedHook(f func()) { scrubListedHook = f }

// SetRemovalHook sets the function a local store calls at the steps of a
// conditional removal (nil removes it).
func SetRemovalHook(f func(step string)) { removalHook = f }

// RemovalChecked is the step after a removal's version check, before
// anything is moved.
const RemovalChecked = stepRemovalChecked
