package fileio

import (
	"os"
	"sync"
)

// cleanups holds the temporary files and folders that a process stopped
// by a signal, without time to unwind, removes on its way out.
var cleanups struct {
	sync.Mutex
	next  int
	paths map[int]string
}

// RemoveOnExit registers the temporary path (a file, or a folder removed
// with what it holds) for RemoveRegistered; forget unregisters it, once
// it was renamed into place or removed by its owner.
func RemoveOnExit(path string) (forget func()) {
	cleanups.Lock()
	defer cleanups.Unlock()
	if cleanups.paths == nil {
		cleanups.paths = map[int]string{}
	}
	id := cleanups.next
	cleanups.next++
	cleanups.paths[id] = path
	return func() {
		cleanups.Lock()
		delete(cleanups.paths, id)
		cleanups.Unlock()
	}
}

// RemoveRegistered removes every path registered with RemoveOnExit and
// not forgotten: for a process about to exit before its work unwound.
func RemoveRegistered() {
	cleanups.Lock()
	defer cleanups.Unlock()
	for id, p := range cleanups.paths {
		os.RemoveAll(p)
		delete(cleanups.paths, id)
	}
}
