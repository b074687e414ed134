package registry

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"slices"
	"sync"
	"time"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
	"golang.org/x/sys/unix"

	"github.com/modelgate/modelgate/internal/errkind"
)

// indexCache holds the parsed index.json of one version of the file. It is
// valid while the path still names the same file unchanged: same device,
// inode, size, modification and change times. The cached version's file is
// kept open, so its inode cannot be freed and its number handed to a newer
// index.json while the cache holds it: an atomic replace (ours or another
// process's) always shows as another inode. A tool that rewrites the file
// in place changes its size or times, except for a rewrite of equal size
// within one tick of the file system clock, which no modelgate writer does.
type indexCache struct {
	mu  sync.Mutex
	f   *os.File // the cached version, held open; closed when replaced
	st  unix.Stat_t
	idx *v1.IndexManifest // shared with callers: never modified
}

func sameVersion(a, b *unix.Stat_t) bool {
	return a.Dev == b.Dev && a.Ino == b.Ino && a.Size == b.Size && a.Mtim == b.Mtim && a.Ctim == b.Ctim
}

func (c *indexCache) get(st *unix.Stat_t) *v1.IndexManifest {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.f != nil && sameVersion(&c.st, st) {
		return c.idx
	}
	return nil
}

// set caches idx as the content of f (whose fstat is st) and takes f.
func (c *indexCache) set(f *os.File, st *unix.Stat_t, idx *v1.IndexManifest) {
	c.mu.Lock()
	defer c.mu.Unlock()
	if c.f != nil {
		c.f.Close()
	}
	c.f, c.st, c.idx = f, *st, idx
}

// readIndex returns index.json's content. It needs no lock: writers
// replace the file by rename, so a reader sees one whole version. The
// result is shared (cached between calls) and must not be modified.
func (l *Local) readIndex() (*v1.IndexManifest, error) {
	p := l.path(indexFile)
	var st unix.Stat_t
	if err := unix.Stat(p, &st); err != nil {
		if errors.Is(err, fs.ErrNotExist) {
			return nil, errkind.New(errkind.Integrity, "store %s has no %s", l.dir, indexFile)
		}
		return nil, fmt.Errorf("reading %s: %w", p, err)
	}
	if idx := l.index.get(&st); idx != nil {
		return idx, nil
	}
	f, err := os.Open(p)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, errkind.New(errkind.Integrity, "store %s has no %s", l.dir, indexFile)
	}
	if err != nil {
		return nil, fmt.Errorf("reading %s: %w", p, err)
	}
	keep := false
	defer func() {
		if !keep {
			f.Close()
		}
	}()
	// The identity of what is read comes from the open file, not from the
	// path, which may have been replaced since the stat above.
	if err := unix.Fstat(int(f.Fd()), &st); err != nil {
		return nil, fmt.Errorf("reading %s: %w", p, err)
	}
	b, err := io.ReadAll(f)
	if err != nil {
		return nil, fmt.Errorf("reading %s: %w", p, err)
	}
	idx, err := parseIndex(p, b)
	if err != nil {
		return nil, err
	}
	keep = true
	l.index.set(f, &st, idx)
	return idx, nil
}

func parseIndex(p string, b []byte) (*v1.IndexManifest, error) {
	var idx v1.IndexManifest
	if err := json.Unmarshal(b, &idx); err != nil {
		return nil, errkind.New(errkind.Integrity, "reading %s: not a valid image index: %w", p, err)
	}
	if idx.SchemaVersion != 2 {
		return nil, errkind.New(errkind.Integrity, "reading %s: schemaVersion %d, want 2", p, idx.SchemaVersion)
	}
	return &idx, nil
}

// writeIndex atomically replaces index.json and caches what it wrote.
// Callers hold the lock and do not modify idx afterwards.
func (l *Local) writeIndex(idx *v1.IndexManifest) error {
	if idx.Manifests == nil {
		idx.Manifests = []v1.Descriptor{}
	}
	if idx.MediaType == "" {
		idx.MediaType = types.OCIImageIndex
	}
	b, err := json.MarshalIndent(idx, "", "  ")
	if err != nil {
		return fmt.Errorf("encoding %s: %w", indexFile, err)
	}
	f, err := l.writeFileAtomic(l.path(indexFile), append(b, '\n'), true, true)
	if err != nil {
		return err
	}
	var st unix.Stat_t
	if err := unix.Fstat(int(f.Fd()), &st); err != nil {
		f.Close()
		return nil // written; the next read parses it again
	}
	l.index.set(f, &st, idx)
	return nil
}

// updateIndex runs fn on a copy of the current index under the exclusive
// lock and, when fn reports a change, writes the result back atomically.
// fn may change the copy's Manifests slice but not the maps of its entries.
func (l *Local) updateIndex(ctx context.Context, fn func(*v1.IndexManifest) (bool, error)) error {
	unlock, err := l.lock(ctx)
	if err != nil {
		return err
	}
	defer unlock()
	cur, err := l.readIndex()
	if err != nil {
		return err
	}
	idx := *cur
	idx.Manifests = slices.Clone(cur.Manifests)
	changed, err := fn(&idx)
	if err != nil || !changed {
		return err
	}
	return l.writeIndex(&idx)
}

// lock takes the store's exclusive lock: a mutex for this process's
// goroutines, then flock(2) on .modelgate/lock for other processes.
func (l *Local) lock(ctx context.Context) (func(), error) {
	if err := ctx.Err(); err != nil {
		return nil, err
	}
	l.mu.Lock()
	p := l.path(lockFile)
	f, err := os.OpenFile(p, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		l.mu.Unlock()
		return nil, fmt.Errorf("locking store: %w", err)
	}
	fd := int(f.Fd())
	// Polled rather than blocking, so that a cancelled ctx (an interrupt)
	// stops the wait for another process's lock.
	wait := time.Millisecond
	for {
		err = unix.Flock(fd, unix.LOCK_EX|unix.LOCK_NB)
		if errors.Is(err, unix.EINTR) {
			continue
		}
		if !errors.Is(err, unix.EWOULDBLOCK) {
			break
		}
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
		case <-t.C:
		}
		if ctx.Err() != nil {
			err = ctx.Err()
			break
		}
		wait = min(2*wait, 20*time.Millisecond)
	}
	if err != nil {
		f.Close()
		l.mu.Unlock()
		return nil, fmt.Errorf("locking store: flock %s: %w", p, err)
	}
	return func() {
		unix.Flock(fd, unix.LOCK_UN)
		f.Close()
		l.mu.Unlock()
	}, nil
}

// writeFileAtomic writes data to a temporary file in .modelgate/tmp and
// renames it to dst, so that readers see the old or the new file, never a
// part. When durable, the file is synced before the rename and dst's folder
// after it; otherwise the caller makes the writes durable (syncfs). When
// keep, the file is returned open (it is dst's new inode); otherwise the
// returned file is nil.
func (l *Local) writeFileAtomic(dst string, data []byte, durable, keep bool) (*os.File, error) {
	f, err := os.CreateTemp(l.path(tmpDir), "file-*")
	if err != nil {
		return nil, fmt.Errorf("writing %s: %w", dst, err)
	}
	tmp := f.Name()
	fail := func(err error) (*os.File, error) {
		if f != nil {
			f.Close()
		}
		os.Remove(tmp)
		return nil, fmt.Errorf("writing %s: %w", dst, err)
	}
	if _, err := f.Write(data); err != nil {
		return fail(err)
	}
	if err := f.Chmod(0o644); err != nil {
		return fail(err)
	}
	step(stepFileWritten)
	if durable {
		if err := f.Sync(); err != nil {
			return fail(err)
		}
		step(stepFileSynced)
	}
	if !keep {
		err := f.Close()
		f = nil
		if err != nil {
			return fail(err)
		}
	}
	if err := os.Rename(tmp, dst); err != nil {
		return fail(err)
	}
	step(stepFileRenamed)
	if durable {
		if err := syncDir(filepath.Dir(dst)); err != nil {
			if f != nil {
				f.Close()
			}
			return nil, fmt.Errorf("writing %s: %w", dst, err)
		}
		step(stepDirSynced)
	}
	return f, nil
}

// syncDir makes a rename or a new entry in dir durable.
func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return err
	}
	err = d.Sync()
	if cerr := d.Close(); err == nil {
		err = cerr
	}
	return err
}
