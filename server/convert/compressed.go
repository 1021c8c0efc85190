package convert

import (
	"bufio"
	"bytes"
	"compress/gzip"
	"errors"
	"fmt"
	"io"
)

// The magic numbers that begin compressed files: gzip (RFC 1952, sec.
// 2.3.1), and, refused by name, zstd (RFC 8878, sec. 3.1.1), xz (the .xz
// file format, sec. 2.1.1.1), bzip2 ("BZh" and a block size digit, from
// memory) and zip (PKWARE APPNOTE, sec. 4.3.7).
var (
	gzipMagic       = []byte{0x1f, 0x8b}
	otherCompressed = []struct {
		magic []byte
		name  string
	}{
		{[]byte{0x28, 0xb5, 0x2f, 0xfd}, "zstd"},
		{[]byte{0xfd, '7', 'z', 'X', 'Z', 0}, "xz"},
		{[]byte("BZh"), "bzip2"},
		{[]byte("PK\x03\x04"), "zip"},
	}
)

// sniffReader reads r, decompressed if it is gzip. It looks at r's first
// bytes at its first Read, not before, so that a reader of a pipe that
// has not written yet is made without waiting for it. err is the
// decompression's error, kept for the reader's message.
type sniffReader struct {
	r   io.Reader
	src io.Reader // nil before the first Read
	gz  bool      // src decompresses r
	err error
}

func (s *sniffReader) Read(p []byte) (int, error) {
	if s.src == nil {
		if err := s.start(); err != nil {
			s.src = failedReader{err}
			return 0, err
		}
	}
	n, err := s.src.Read(p)
	if err != nil && err != io.EOF && s.gz {
		if errors.Is(err, io.ErrUnexpectedEOF) {
			err = fmt.Errorf("%w: the gzip-compressed file ends early (was it cut short while copied or written?)", err)
		}
		s.err = fmt.Errorf("decompressing the file (gzip): %w", err)
		return n, s.err
	}
	return n, err
}

// start looks at the first bytes of s.r and sets s.src.
func (s *sniffReader) start() error {
	br := bufio.NewReader(s.r)
	s.src = br
	head, err := br.Peek(6)
	if err != nil && err != io.EOF && len(head) == 0 {
		return err
	}
	for _, c := range otherCompressed {
		if bytes.HasPrefix(head, c.magic) && (c.name != "bzip2" || len(head) > 3 && head[3] >= '1' && head[3] <= '9') {
			return fmt.Errorf("the file is %s-compressed; decompress it first, or compress it with gzip, which is read as it is", c.name)
		}
	}
	if !bytes.HasPrefix(head, gzipMagic) {
		return nil
	}
	zr, err := gzip.NewReader(br)
	if err != nil {
		s.err = fmt.Errorf("decompressing the file (gzip): %w", err)
		return s.err
	}
	s.src, s.gz = zr, true
	return nil
}

// failedReader returns its error at every Read.
type failedReader struct{ err error }

func (f failedReader) Read([]byte) (int, error) { return 0, f.err }
