package journal

import (
	"errors"
	"io"
	"os"
	"path/filepath"
	"sort"
	"strconv"
)

// FS is the file system the journal works on: the operating system's by
// default (OS), a fault-injecting or crashable one in tests (package
// faultfs). The interface is small on purpose, in the manner of pebble's
// vfs.FS: what the journal needs and nothing else. Names are paths as
// filepath.Join makes them.
type FS interface {
	// OpenFile opens a file with os.OpenFile's flags (O_RDONLY, O_WRONLY,
	// O_RDWR, O_CREATE, O_EXCL, O_TRUNC, O_APPEND) and permission.
	OpenFile(name string, flag int, perm os.FileMode) (File, error)
	// Rename renames a file, replacing newname if it exists.
	Rename(oldname, newname string) error
	// Remove removes a file.
	Remove(name string) error
	// List returns the names (not paths) of the entries of dir, sorted.
	List(dir string) ([]string, error)
	// MkdirAll creates a directory and its parents.
	MkdirAll(dir string, perm os.FileMode) error
	// Stat describes a file; a missing one gives an error that is
	// errors.Is(err, fs.ErrNotExist).
	Stat(name string) (os.FileInfo, error)
	// SyncDir makes the directory's entries (creations, renames, removals)
	// durable.
	SyncDir(dir string) error
	// Lock takes an exclusive advisory lock on the file name, creating it;
	// it fails at once if another holder has it. Closing the result
	// releases the lock.
	Lock(name string) (File, error)
}

// File is an open file of an FS.
type File interface {
	io.Reader
	io.Writer
	io.Closer
	// Sync makes the file's contents durable.
	Sync() error
	// Truncate changes the file's size, bytes.
	Truncate(size int64) error
	// Stat describes the open file.
	Stat() (os.FileInfo, error)
}

// OS is the operating system's file system.
var OS FS = osFS{}

// orOS returns fsys, or OS when it is nil.
func orOS(fsys FS) FS {
	if fsys == nil {
		return OS
	}
	return fsys
}

type osFS struct{}

func (osFS) OpenFile(name string, flag int, perm os.FileMode) (File, error) {
	f, err := os.OpenFile(name, flag, perm)
	if err != nil {
		return nil, err // not a nil *os.File in an interface
	}
	return f, nil
}

func (osFS) Rename(oldname, newname string) error        { return os.Rename(oldname, newname) }
func (osFS) Remove(name string) error                    { return os.Remove(name) }
func (osFS) MkdirAll(dir string, perm os.FileMode) error { return os.MkdirAll(dir, perm) }
func (osFS) Stat(name string) (os.FileInfo, error)       { return os.Stat(name) }

func (osFS) List(dir string) ([]string, error) {
	es, err := os.ReadDir(dir)
	if err != nil {
		return nil, err
	}
	out := make([]string, len(es))
	for i, e := range es {
		out[i] = e.Name()
	}
	sort.Strings(out)
	return out, nil
}

func (osFS) SyncDir(dir string) error {
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

func (osFS) Lock(name string) (File, error) {
	f, err := os.OpenFile(name, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		return nil, err
	}
	if err := lockFile(f); err != nil {
		f.Close()
		return nil, err
	}
	return f, nil
}

// readFile reads a whole file into one buffer.
func readFile(fsys FS, name string) ([]byte, error) { return readFileInto(fsys, name, nil) }

// readFileInto is readFile into buf when the file fits in its capacity.
func readFileInto(fsys FS, name string, buf []byte) ([]byte, error) {
	f, err := fsys.OpenFile(name, os.O_RDONLY, 0)
	if err != nil {
		return nil, err
	}
	defer f.Close()
	size := 0
	if fi, err := f.Stat(); err == nil && fi.Size() > 0 {
		size = int(fi.Size())
	}
	b := buf[:0]
	if cap(b) < size+1 {
		b = make([]byte, 0, size+1) // +1: ReadAll sees EOF without growing
	}
	for {
		n, err := f.Read(b[len(b):cap(b)])
		b = b[:len(b)+n]
		if errors.Is(err, io.EOF) {
			return b, nil
		}
		if err != nil {
			return b, err
		}
		if len(b) == cap(b) {
			b = append(b, 0)[:len(b)]
		}
	}
}

// writeFileAtomic writes data to name through name.tmp: the temporary
// file is written and fsynced, renamed over name and the directory
// fsynced, so that name holds either its old contents or all of data,
// whatever crashes. A failure removes the temporary file.
func writeFileAtomic(fsys FS, name string, data []byte) error {
	tmp := name + tmpExt
	if err := writeSynced(fsys, tmp, data, os.O_WRONLY|os.O_CREATE|os.O_TRUNC); err != nil {
		fsys.Remove(tmp)
		return err
	}
	if err := fsys.Rename(tmp, name); err != nil {
		fsys.Remove(tmp)
		return err
	}
	return fsys.SyncDir(filepath.Dir(name))
}

// writeSynced creates a file with data and fsyncs it (not its directory).
func writeSynced(fsys FS, name string, data []byte, flag int) error {
	f, err := fsys.OpenFile(name, flag, 0o644)
	if err != nil {
		return err
	}
	_, err = f.Write(data)
	if err == nil {
		err = f.Sync()
	}
	if cerr := f.Close(); err == nil {
		err = cerr
	}
	return err
}

// asideName returns base if no file has that name, else base.1, base.2
// and so on: a name for something kept aside that never overwrites.
func asideName(fsys FS, base string) (string, error) {
	name := base
	for i := 1; ; i++ {
		_, err := fsys.Stat(name)
		if errors.Is(err, os.ErrNotExist) {
			return name, nil
		}
		if err != nil {
			return "", err
		}
		name = base + "." + strconv.Itoa(i)
	}
}

// ReserveFile is a File that the journal appends to by copying into space
// reserved ahead on disk, rather than by write(2): an operating-system
// file through a shared memory map (see mapRegion), a test's file system
// by a copy under its lock. What a copy leaves is what a write leaves: the
// page cache, which a crash of the process keeps and a power loss keeps as
// far as it was synced.
type ReserveFile interface {
	File
	// Reserve makes the file size bytes long (never shorter), the new
	// bytes zeros allocated on disk, so that copying into them needs no
	// more space. It returns an error wrapping errors.ErrUnsupported when
	// the file system cannot reserve; the journal then writes.
	Reserve(size int64) error
	// CopyAt copies p into the file at byte off; off+len(p) is at most the
	// reserved size. On an error, n bytes may have been copied.
	CopyAt(p []byte, off int64) (n int, err error)
}
