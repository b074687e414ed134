package registry

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"io/fs"
	"os"
	"path/filepath"

	v1 "github.com/google/go-containerregistry/pkg/v1"
	"github.com/google/go-containerregistry/pkg/v1/types"
	"golang.org/x/sys/unix"

	"modelgate/internal/errkind"
)

// readIndex reads index.json. It needs no lock: writers replace the file
// by rename, so a reader sees one whole version.
func (l *Local) readIndex() (*v1.IndexManifest, error) {
	p := l.path(indexFile)
	b, err := os.ReadFile(p)
	if errors.Is(err, fs.ErrNotExist) {
		return nil, errkind.New(errkind.Integrity, "store %s has no %s", l.dir, indexFile)
	}
	if err != nil {
		return nil, fmt.Errorf("reading %s: %w", p, err)
	}
	var idx v1.IndexManifest
	if err := json.Unmarshal(b, &idx); err != nil {
		return nil, errkind.New(errkind.Integrity, "reading %s: not a valid image index: %w", p, err)
	}
	if idx.SchemaVersion != 2 {
		return nil, errkind.New(errkind.Integrity, "reading %s: schemaVersion %d, want 2", p, idx.SchemaVersion)
	}
	return &idx, nil
}

// writeIndex atomically replaces index.json. Callers hold the lock.
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
	return l.writeFileAtomic(l.path(indexFile), append(b, '\n'))
}

// updateIndex runs fn on the current index under the exclusive lock and,
// when fn reports a change, writes the result back atomically.
func (l *Local) updateIndex(ctx context.Context, fn func(*v1.IndexManifest) (bool, error)) error {
	unlock, err := l.lock(ctx)
	if err != nil {
		return err
	}
	defer unlock()
	idx, err := l.readIndex()
	if err != nil {
		return err
	}
	changed, err := fn(idx)
	if err != nil || !changed {
		return err
	}
	return l.writeIndex(idx)
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
	for {
		err = unix.Flock(fd, unix.LOCK_EX)
		if !errors.Is(err, unix.EINTR) {
			break
		}
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

// writeFileAtomic writes data to a temporary file in .modelgate/tmp,
// syncs it, renames it to dst and syncs dst's folder.
func (l *Local) writeFileAtomic(dst string, data []byte) (err error) {
	f, err := os.CreateTemp(l.path(tmpDir), "file-*")
	if err != nil {
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	tmp := f.Name()
	defer func() {
		if err != nil {
			os.Remove(tmp)
		}
	}()
	if _, err := f.Write(data); err != nil {
		f.Close()
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	if err := f.Sync(); err != nil {
		f.Close()
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	if err := f.Close(); err != nil {
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	if err := os.Chmod(tmp, 0o644); err != nil {
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	if err := os.Rename(tmp, dst); err != nil {
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	if err := syncDir(filepath.Dir(dst)); err != nil {
		return fmt.Errorf("writing %s: %w", dst, err)
	}
	return nil
}

// syncDir makes a rename in dir durable.
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
