//go:build !crashpoints

// Package crashpoint marks the steps the crash suite kills a process
// after. In a binary built with -tags crashpoints (the crash suite's own
// build, never a release), Step sends the process SIGKILL the N-th time it
// passes the step that $MODELGATE_TEST_CRASH_AT names as STEP:N; in every
// other build it does nothing.
package crashpoint

// EnvCrashAt names the step to be killed after, as STEP:N.
const EnvCrashAt = "MODELGATE_TEST_CRASH_AT"

// Step marks a step; a no-op in this build.
func Step(string) {}
