package faultfs

import (
	"errors"
	"fmt"
	"io"
	"io/fs"
	"os"
	"path/filepath"
	"sort"
	"sync"
	"syscall"
	"time"

	"reckon.example/server/journal"
)

// MemFS is an in-memory journal.FS that can crash (see Crash). Directories
// made by MkdirAll are kept by a crash; files and directory entries only
// as far as they were synced. It is safe for concurrent use.
type MemFS struct {
	// Plain makes the files unable to reserve space (Reserve fails with
	// errors.ErrUnsupported), so that the journal appends by Write. Set
	// it before the first OpenFile.
	Plain bool

	mu    sync.Mutex
	dirs  map[string]*memDir
	locks map[string]bool // names locked by Lock
	// capacity, if above 0, is the size of the disk (SetCapacity).
	capacity int64
}

// memDir is a directory: its entries now and as of its last sync.
type memDir struct {
	live, synced map[string]*inode
}

// inode is a file: its contents now and as of its last sync.
type inode struct {
	data, synced []byte
}

// NewMem returns an empty MemFS.
func NewMem() *MemFS {
	return &MemFS{dirs: map[string]*memDir{}, locks: map[string]bool{}}
}

// Crash returns the file system as a power loss would leave this one: each
// directory with the entries it had at its last SyncDir, each file with
// the contents it had at its last Sync. This one is left as it was;
// files open on it stay open on it.
func (m *MemFS) Crash() *MemFS {
	m.mu.Lock()
	defer m.mu.Unlock()
	c := NewMem()
	c.capacity = m.capacity
	for path, d := range m.dirs {
		nd := &memDir{live: map[string]*inode{}, synced: map[string]*inode{}}
		for name, ino := range d.synced {
			data := append([]byte(nil), ino.synced...)
			n := &inode{data: data, synced: append([]byte(nil), data...)}
			nd.live[name], nd.synced[name] = n, n
		}
		c.dirs[path] = nd
	}
	return c
}

// Kill returns the file system as the daemon's SIGKILL would leave this
// one: each directory with the entries it has now, each file with the
// contents it has now (the page cache outlives the process), synced as
// far as it was. This one is left as it was.
func (m *MemFS) Kill() *MemFS {
	m.mu.Lock()
	defer m.mu.Unlock()
	c := NewMem()
	c.Plain, c.capacity = m.Plain, m.capacity
	copies := map[*inode]*inode{}
	clone := func(ino *inode) *inode {
		if n := copies[ino]; n != nil {
			return n
		}
		n := &inode{data: append([]byte(nil), ino.data...), synced: append([]byte(nil), ino.synced...)}
		copies[ino] = n
		return n
	}
	for path, d := range m.dirs {
		nd := &memDir{live: map[string]*inode{}, synced: map[string]*inode{}}
		for name, ino := range d.live {
			nd.live[name] = clone(ino)
		}
		for name, ino := range d.synced {
			nd.synced[name] = clone(ino)
		}
		c.dirs[path] = nd
	}
	return c
}

func notExist(op, path string) error { return &os.PathError{Op: op, Path: path, Err: fs.ErrNotExist} }

// lookup returns the directory of path and the file's name in it; the
// caller holds m.mu.
func (m *MemFS) lookup(op, path string) (*memDir, string, error) {
	path = filepath.Clean(path)
	d := m.dirs[filepath.Dir(path)]
	if d == nil {
		return nil, "", notExist(op, path)
	}
	return d, filepath.Base(path), nil
}

// OpenFile opens or creates a file.
func (m *MemFS) OpenFile(name string, flag int, perm os.FileMode) (journal.File, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	d, base, err := m.lookup("open", name)
	if err != nil {
		return nil, err
	}
	ino := d.live[base]
	switch {
	case ino == nil && flag&os.O_CREATE == 0:
		return nil, notExist("open", name)
	case ino != nil && flag&os.O_CREATE != 0 && flag&os.O_EXCL != 0:
		return nil, &os.PathError{Op: "open", Path: name, Err: fs.ErrExist}
	case ino == nil:
		ino = &inode{}
		d.live[base] = ino
	}
	if flag&os.O_TRUNC != 0 {
		ino.data = ino.data[:0:0]
	}
	return &memFile{m: m, name: name, ino: ino, flag: flag}, nil
}

// Rename moves a file's entry, replacing newname's.
func (m *MemFS) Rename(oldname, newname string) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	od, ob, err := m.lookup("rename", oldname)
	if err != nil {
		return err
	}
	nd, nb, err := m.lookup("rename", newname)
	if err != nil {
		return err
	}
	ino := od.live[ob]
	if ino == nil {
		return notExist("rename", oldname)
	}
	delete(od.live, ob)
	nd.live[nb] = ino
	return nil
}

// Remove removes a file's entry.
func (m *MemFS) Remove(name string) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	d, base, err := m.lookup("remove", name)
	if err != nil {
		return err
	}
	if d.live[base] == nil {
		return notExist("remove", name)
	}
	delete(d.live, base)
	return nil
}

// List returns the names in a directory, sorted.
func (m *MemFS) List(dir string) ([]string, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	d := m.dirs[filepath.Clean(dir)]
	if d == nil {
		return nil, notExist("list", dir)
	}
	out := make([]string, 0, len(d.live))
	for name := range d.live {
		out = append(out, name)
	}
	sort.Strings(out)
	return out, nil
}

// MkdirAll makes a directory and its parents.
func (m *MemFS) MkdirAll(dir string, perm os.FileMode) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	for p := filepath.Clean(dir); ; p = filepath.Dir(p) {
		if m.dirs[p] == nil {
			m.dirs[p] = &memDir{live: map[string]*inode{}, synced: map[string]*inode{}}
		}
		if p == filepath.Dir(p) {
			return nil
		}
	}
}

// Stat describes a file or directory.
func (m *MemFS) Stat(name string) (os.FileInfo, error) {
	m.mu.Lock()
	defer m.mu.Unlock()
	if m.dirs[filepath.Clean(name)] != nil {
		return memInfo{name: filepath.Base(name), dir: true}, nil
	}
	d, base, err := m.lookup("stat", name)
	if err != nil {
		return nil, err
	}
	ino := d.live[base]
	if ino == nil {
		return nil, notExist("stat", name)
	}
	return memInfo{name: base, size: int64(len(ino.data)), ino: ino}, nil
}

// SyncDir makes a directory's entries as they are now survive a crash.
func (m *MemFS) SyncDir(dir string) error {
	m.mu.Lock()
	defer m.mu.Unlock()
	d := m.dirs[filepath.Clean(dir)]
	if d == nil {
		return notExist("syncdir", dir)
	}
	d.synced = make(map[string]*inode, len(d.live))
	for name, ino := range d.live {
		d.synced[name] = ino
	}
	return nil
}

// Lock creates the file if needed and locks it until the returned file is
// closed; a second Lock of the same name fails with journal.ErrLockHeld.
func (m *MemFS) Lock(name string) (journal.File, error) {
	f, err := m.OpenFile(name, os.O_RDWR|os.O_CREATE, 0o644)
	if err != nil {
		return nil, err
	}
	m.mu.Lock()
	defer m.mu.Unlock()
	key := filepath.Clean(name)
	if m.locks[key] {
		return nil, fmt.Errorf("lock %s: %w", name, journal.ErrLockHeld)
	}
	m.locks[key] = true
	mf := f.(*memFile)
	mf.unlock = key
	return mf, nil
}

// memFile is an open file of a MemFS.
type memFile struct {
	m      *MemFS
	name   string
	ino    *inode
	flag   int
	pos    int64
	unlock string // the lock Close releases ("": none)
	closed bool
}

func (f *memFile) Read(p []byte) (int, error) {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return 0, os.ErrClosed
	}
	if f.pos >= int64(len(f.ino.data)) {
		return 0, io.EOF
	}
	n := copy(p, f.ino.data[f.pos:])
	f.pos += int64(n)
	return n, nil
}

// Seek sets the offset of the next Read or Write.
func (f *memFile) Seek(offset int64, whence int) (int64, error) {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return 0, os.ErrClosed
	}
	switch whence {
	case io.SeekCurrent:
		offset += f.pos
	case io.SeekEnd:
		offset += int64(len(f.ino.data))
	}
	if offset < 0 {
		return 0, &os.PathError{Op: "seek", Path: f.name, Err: os.ErrInvalid}
	}
	f.pos = offset
	return offset, nil
}

func (f *memFile) Write(p []byte) (int, error) {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return 0, os.ErrClosed
	}
	if f.flag&(os.O_WRONLY|os.O_RDWR) == 0 {
		return 0, &os.PathError{Op: "write", Path: f.name, Err: os.ErrPermission}
	}
	if f.flag&os.O_APPEND != 0 {
		f.pos = int64(len(f.ino.data))
	}
	var full error
	if room := f.room(); room >= 0 && f.pos+int64(len(p))-int64(len(f.ino.data)) > room {
		p = p[:max(int64(len(f.ino.data))+room-f.pos, 0)]
		full = &os.PathError{Op: "write", Path: f.name, Err: syscall.ENOSPC}
	}
	end := f.pos + int64(len(p))
	if end > int64(len(f.ino.data)) {
		f.ino.data = append(f.ino.data, make([]byte, end-int64(len(f.ino.data)))...)
	}
	copy(f.ino.data[f.pos:], p)
	f.pos = end
	return len(p), full
}

// SetCapacity makes n bytes the size of the disk (0: no limit): the bytes
// of all files together may not grow past it. A Write past it writes what
// fits and fails with ENOSPC, as write(2) does; a Reserve past it reserves
// nothing and fails with ENOSPC, as fallocate(2) does. A crash or kill
// keeps it.
func (m *MemFS) SetCapacity(n int64) {
	m.mu.Lock()
	m.capacity = n
	m.mu.Unlock()
}

// Used returns the bytes of all files.
func (m *MemFS) Used() int64 {
	m.mu.Lock()
	defer m.mu.Unlock()
	return m.used()
}

// used returns the bytes of all live files. The caller holds m.mu.
func (m *MemFS) used() int64 {
	seen := map[*inode]bool{}
	var n int64
	for _, d := range m.dirs {
		for _, ino := range d.live {
			if !seen[ino] {
				seen[ino] = true
				n += int64(len(ino.data))
			}
		}
	}
	return n
}

// room returns how many bytes file f may grow by (Capacity), or -1 for
// any number. The caller holds m.mu.
func (f *memFile) room() int64 {
	if f.m.capacity <= 0 {
		return -1
	}
	return max(f.m.capacity-f.m.used(), 0)
}

// Reserve extends the file with zeros to size bytes (journal.ReserveFile).
func (f *memFile) Reserve(size int64) error {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return os.ErrClosed
	}
	if f.m.Plain {
		return fmt.Errorf("reserve %s: %w", f.name, errors.ErrUnsupported)
	}
	if grow := size - int64(len(f.ino.data)); grow > 0 {
		if room := f.room(); room >= 0 && grow > room {
			return &os.PathError{Op: "fallocate", Path: f.name, Err: syscall.ENOSPC}
		}
		f.ino.data = append(f.ino.data, make([]byte, grow)...)
	}
	return nil
}

// CopyAt copies p into the file at off, inside its size, as a store into
// a shared memory map of the file does: a copy past the end fails with
// EIO, as such a store's SIGBUS does in the journal.
func (f *memFile) CopyAt(p []byte, off int64) (int, error) {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return 0, os.ErrClosed
	}
	if off < 0 || off+int64(len(p)) > int64(len(f.ino.data)) {
		return 0, &os.PathError{Op: "copy", Path: f.name, Err: syscall.EIO}
	}
	return copy(f.ino.data[off:], p), nil
}

func (f *memFile) Sync() error {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return os.ErrClosed
	}
	f.ino.synced = append(f.ino.synced[:0:0], f.ino.data...)
	return nil
}

func (f *memFile) Truncate(size int64) error {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return os.ErrClosed
	}
	if size < int64(len(f.ino.data)) {
		f.ino.data = f.ino.data[:size:size]
	} else {
		f.ino.data = append(f.ino.data, make([]byte, size-int64(len(f.ino.data)))...)
	}
	return nil
}

func (f *memFile) Stat() (os.FileInfo, error) {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	return memInfo{name: filepath.Base(f.name), size: int64(len(f.ino.data)), ino: f.ino}, nil
}

func (f *memFile) Close() error {
	f.m.mu.Lock()
	defer f.m.mu.Unlock()
	if f.closed {
		return os.ErrClosed
	}
	f.closed = true
	if f.unlock != "" {
		delete(f.m.locks, f.unlock)
	}
	return nil
}

// memInfo describes a file or directory of a MemFS.
type memInfo struct {
	name string
	size int64
	dir  bool
	ino  *inode // a file's, which Sys gives (journal.DirLock.Check compares it)
}

func (i memInfo) Name() string { return i.name }
func (i memInfo) Size() int64  { return i.size }
func (i memInfo) Mode() os.FileMode {
	if i.dir {
		return os.ModeDir | 0o755
	}
	return 0o644
}
func (i memInfo) ModTime() time.Time { return time.Time{} }
func (i memInfo) IsDir() bool        { return i.dir }
func (i memInfo) Sys() any {
	if i.ino == nil {
		return nil
	}
	return i.ino
}
