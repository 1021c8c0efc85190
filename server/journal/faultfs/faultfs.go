package faultfs

import (
	"errors"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"

	"reckon.example/server/journal"
)

// Op is a kind of file-system operation.
type Op int

// The operations FS can fail.
const (
	OpCreate   Op = iota // OpenFile with O_CREATE
	OpOpen               // OpenFile without O_CREATE
	OpWrite              // File.Write
	OpSync               // File.Sync
	OpTruncate           // File.Truncate
	OpRead               // File.Read
	OpRename             // Rename (the path is the old name)
	OpRemove             // Remove
	OpList               // List
	OpMkdir              // MkdirAll
	OpStat               // Stat and File.Stat
	OpSyncDir            // SyncDir
	OpLock               // Lock
	OpReserve            // File.Reserve (File.CopyAt counts as OpWrite)
	numOps
)

var opNames = [numOps]string{"create", "open", "write", "sync", "truncate", "read", "rename", "remove", "list", "mkdir", "stat", "syncdir", "lock", "reserve"}

// String returns the operation's name.
func (op Op) String() string {
	if op >= 0 && op < numOps {
		return opNames[op]
	}
	return fmt.Sprintf("op(%d)", int(op))
}

// Injector decides whether an operation on path fails: a non-nil error
// fails it.
type Injector func(op Op, path string) error

// FS is a journal.FS that passes every operation to Base unless Inject
// fails it; it counts the operations of each kind.
type FS struct {
	Base   journal.FS
	Inject Injector
	// ShortWrite makes a failed write write the first half of its bytes
	// before it returns the error, as a write that ran out of space does.
	ShortWrite bool

	mu     sync.Mutex
	counts [numOps]int
	read   int64 // bytes read, by every file
}

// New returns an FS over base that fails what inject says.
func New(base journal.FS, inject Injector) *FS { return &FS{Base: base, Inject: inject} }

// SetInject replaces Inject while the FS is in use (a server's periodic
// fsync may be running): Inject itself is read under the same lock, so a
// test that assigns it directly races with that goroutine.
func (f *FS) SetInject(inject Injector) {
	f.mu.Lock()
	f.Inject = inject
	f.mu.Unlock()
}

// Count returns how many operations of kind op were attempted.
func (f *FS) Count(op Op) int {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.counts[op]
}

// BytesRead returns how many bytes the reads of every file of the FS
// returned so far (a seek reads none).
func (f *FS) BytesRead() int64 {
	f.mu.Lock()
	defer f.mu.Unlock()
	return f.read
}

// check counts an operation and returns the error to inject, if any, as
// the *os.PathError the operating system would give.
func (f *FS) check(op Op, path string) error {
	f.mu.Lock()
	f.counts[op]++
	inject := f.Inject
	f.mu.Unlock()
	if inject == nil {
		return nil
	}
	if err := inject(op, path); err != nil {
		return &os.PathError{Op: op.String(), Path: path, Err: err}
	}
	return nil
}

// Nth fails the n-th (from 0) operation of kind op on a path containing
// pathPart ("" matches every path) with err, and no other: a transient
// fault.
func Nth(op Op, pathPart string, n int, err error) Injector {
	return rule(op, pathPart, n, err, false)
}

// From fails the n-th operation of kind op on a path containing pathPart,
// and every later one, with err: a fault that lasts, as a full disk does.
func From(op Op, pathPart string, n int, err error) Injector {
	return rule(op, pathPart, n, err, true)
}

func rule(op Op, pathPart string, n int, err error, lasting bool) Injector {
	var mu sync.Mutex
	seen := 0
	return func(o Op, path string) error {
		if o != op || !strings.Contains(path, pathPart) {
			return nil
		}
		mu.Lock()
		defer mu.Unlock()
		i := seen
		seen++
		if i == n || (lasting && i > n) {
			return err
		}
		return nil
	}
}

// OpenFile opens a file of Base, counted as OpCreate with O_CREATE, else
// OpOpen.
func (f *FS) OpenFile(name string, flag int, perm os.FileMode) (journal.File, error) {
	op := OpOpen
	if flag&os.O_CREATE != 0 {
		op = OpCreate
	}
	if err := f.check(op, name); err != nil {
		return nil, err
	}
	file, err := f.Base.OpenFile(name, flag, perm)
	if err != nil {
		return nil, err
	}
	return &faultFile{fs: f, name: name, f: file}, nil
}

// Rename renames in Base unless OpRename is failed.
func (f *FS) Rename(oldname, newname string) error {
	if err := f.check(OpRename, oldname); err != nil {
		return err
	}
	return f.Base.Rename(oldname, newname)
}

// Remove removes in Base unless OpRemove is failed.
func (f *FS) Remove(name string) error {
	if err := f.check(OpRemove, name); err != nil {
		return err
	}
	return f.Base.Remove(name)
}

// List lists in Base unless OpList is failed.
func (f *FS) List(dir string) ([]string, error) {
	if err := f.check(OpList, dir); err != nil {
		return nil, err
	}
	return f.Base.List(dir)
}

// MkdirAll makes directories in Base unless OpMkdir is failed.
func (f *FS) MkdirAll(dir string, perm os.FileMode) error {
	if err := f.check(OpMkdir, dir); err != nil {
		return err
	}
	return f.Base.MkdirAll(dir, perm)
}

// Stat describes a file of Base unless OpStat is failed.
func (f *FS) Stat(name string) (os.FileInfo, error) {
	if err := f.check(OpStat, name); err != nil {
		return nil, err
	}
	return f.Base.Stat(name)
}

// SyncDir syncs a directory of Base unless OpSyncDir is failed.
func (f *FS) SyncDir(dir string) error {
	if err := f.check(OpSyncDir, dir); err != nil {
		return err
	}
	return f.Base.SyncDir(dir)
}

// Lock locks in Base unless OpLock is failed.
func (f *FS) Lock(name string) (journal.File, error) {
	if err := f.check(OpLock, name); err != nil {
		return nil, err
	}
	return f.Base.Lock(name)
}

// faultFile is a file of an FS.
type faultFile struct {
	fs   *FS
	name string
	f    journal.File
}

func (ff *faultFile) Read(p []byte) (int, error) {
	if err := ff.fs.check(OpRead, ff.name); err != nil {
		return 0, err
	}
	n, err := ff.f.Read(p)
	ff.fs.mu.Lock()
	ff.fs.read += int64(n)
	ff.fs.mu.Unlock()
	return n, err
}

func (ff *faultFile) Write(p []byte) (int, error) {
	if err := ff.fs.check(OpWrite, ff.name); err != nil {
		n := 0
		if ff.fs.ShortWrite {
			n, _ = ff.f.Write(p[:len(p)/2])
		}
		return n, err
	}
	return ff.f.Write(p)
}

// Reserve reserves in the base file, unless OpReserve is failed; a base
// file that cannot reserve gives errors.ErrUnsupported.
func (ff *faultFile) Reserve(size int64) error {
	rf, ok := ff.f.(journal.ReserveFile)
	if !ok {
		return fmt.Errorf("reserve %s: %w", ff.name, errors.ErrUnsupported)
	}
	if err := ff.fs.check(OpReserve, ff.name); err != nil {
		return err
	}
	return rf.Reserve(size)
}

// CopyAt copies into the base file, unless OpWrite is failed: with
// ShortWrite the first half of p is copied first, as a fault part way
// through a copy leaves it.
func (ff *faultFile) CopyAt(p []byte, off int64) (int, error) {
	rf, ok := ff.f.(journal.ReserveFile)
	if !ok {
		return 0, fmt.Errorf("copy %s: %w", ff.name, errors.ErrUnsupported)
	}
	if err := ff.fs.check(OpWrite, ff.name); err != nil {
		n := 0
		if ff.fs.ShortWrite {
			n, _ = rf.CopyAt(p[:len(p)/2], off)
		}
		return n, err
	}
	return rf.CopyAt(p, off)
}

func (ff *faultFile) Sync() error {
	if err := ff.fs.check(OpSync, ff.name); err != nil {
		return err
	}
	return ff.f.Sync()
}

func (ff *faultFile) Truncate(size int64) error {
	if err := ff.fs.check(OpTruncate, ff.name); err != nil {
		return err
	}
	return ff.f.Truncate(size)
}

func (ff *faultFile) Stat() (os.FileInfo, error) {
	if err := ff.fs.check(OpStat, ff.name); err != nil {
		return nil, err
	}
	return ff.f.Stat()
}

// Seek sets the offset of the next Read in the base file; a base file
// that cannot seek gives errors.ErrUnsupported.
func (ff *faultFile) Seek(offset int64, whence int) (int64, error) {
	s, ok := ff.f.(io.Seeker)
	if !ok {
		return 0, fmt.Errorf("seek %s: %w", ff.name, errors.ErrUnsupported)
	}
	return s.Seek(offset, whence)
}

func (ff *faultFile) Close() error { return ff.f.Close() }
