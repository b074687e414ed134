package release

import "github.com/modelgate/modelgate/internal/crashpoint"

// EnvCrashAt names the release step the crash suite kills the process
// after (see package crashpoint).
const EnvCrashAt = crashpoint.EnvCrashAt

// crashPoint marks a step of a release that the crash suite kills the
// process after (built with -tags crashpoints); a no-op otherwise.
func crashPoint(step string) { crashpoint.Step(step) }
