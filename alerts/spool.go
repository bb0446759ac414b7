package alerts

import (
	"encoding/json"
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"slices"
	"strconv"
	"strings"
	"sync"
	"time"
)

// DefaultSpoolMaxEvents bounds the spool when no limit is given. An alert
// event is about 0.5 KiB, one file of one 4 KiB block on most file systems,
// so a full default spool takes about 400 MiB of disk: far more than any outage produces (a bed raising one event a minute fills
// it in about 70 days), yet a hard ceiling on what a broken link can cost.
const DefaultSpoolMaxEvents = 100_000

// ErrSpoolFull is returned by Spool.Append when the spool already holds its
// maximum number of events. The new event is refused, not written, and the
// older pending events are kept: consumers see a gap at the end rather than
// a hole in the middle. The caller must log the refusal loudly; the spool
// never drops an event silently.
var ErrSpoolFull = errors.New("alert spool full")

// ErrSpoolClosed is returned by Spool methods after Close.
var ErrSpoolClosed = errors.New("alert spool closed")

// ErrSpoolLocked is returned by OpenSpool when another open spool (another
// trapline process, usually) holds the directory.
var ErrSpoolLocked = errors.New("alert spool in use by another process")

const (
	spoolSuffix  = ".json"
	spoolTmp     = ".tmp-"
	spoolCorrupt = "corrupt"
	spoolLock    = "LOCK"
	// spoolDigits is wide enough for any uint64, so lexical order of the
	// file names is numeric order, which is arrival order.
	spoolDigits = 20
)

// SpoolEntry is one pending event in the spool: its sequence number, the
// encoded event exactly as it will be published, and the decoded fields the
// publisher needs to address it.
type SpoolEntry struct {
	Seq   uint64
	Data  []byte
	Event Event
}

// Spool is an append-only, crash-safe queue of alert events in a directory.
// Every event is its own file, named by a zero-padded sequence number so that
// lexical order is arrival order. Append writes a temporary file, fsyncs it,
// renames it into place and fsyncs the directory before it returns: once
// Append has returned nil the event survives a crash or power loss. The
// publisher removes an entry only after JetStream acknowledged it.
//
// A Spool is safe for concurrent use; a lock file keeps a second process off
// the same directory.
type Spool struct {
	dir string
	max int

	mu      sync.Mutex
	lock    *os.File
	pending []uint64       // sequence numbers on disk, oldest first
	ranks   map[uint64]int // rank of events appended by this process (spool_rank.go)
	next    uint64
	corrupt int
	closed  bool
}

// OpenSpool opens (creating it when needed) the spool directory dir, holding
// at most maxEvents events (DefaultSpoolMaxEvents when maxEvents <= 0).
// Events left by an earlier run are kept and come out first; the sequence
// continues after the highest one found. Half-written temporary files (a
// crash inside Append, before it returned) are removed: their Append never
// succeeded.
func OpenSpool(dir string, maxEvents int) (*Spool, error) {
	if dir == "" {
		return nil, errors.New("open alert spool: empty directory")
	}
	if maxEvents <= 0 {
		maxEvents = DefaultSpoolMaxEvents
	}
	if err := os.MkdirAll(dir, 0o750); err != nil {
		return nil, fmt.Errorf("open alert spool %s: %w", dir, err)
	}
	lock, err := lockDir(filepath.Join(dir, spoolLock))
	if err != nil {
		return nil, fmt.Errorf("open alert spool %s: %w", dir, err)
	}
	s := &Spool{dir: dir, max: maxEvents, lock: lock, next: 1}
	ents, err := os.ReadDir(dir)
	if err != nil {
		_ = lock.Close()
		return nil, fmt.Errorf("open alert spool %s: %w", dir, err)
	}
	for _, e := range ents {
		name := e.Name()
		switch {
		case e.IsDir() || name == spoolLock:
		case strings.HasPrefix(name, spoolTmp):
			_ = os.Remove(filepath.Join(dir, name))
		case strings.HasSuffix(name, spoolSuffix):
			seq, err := strconv.ParseUint(strings.TrimSuffix(name, spoolSuffix), 10, 64)
			if err != nil || seq == 0 {
				s.moveAside(name)
				continue
			}
			s.pending = append(s.pending, seq)
		}
	}
	slices.Sort(s.pending)
	if n := len(s.pending); n > 0 {
		s.next = s.pending[n-1] + 1
	}
	return s, nil
}

// Dir returns the spool directory.
func (s *Spool) Dir() string { return s.dir }

// Max returns the most events the spool holds.
func (s *Spool) Max() int { return s.max }

// Depth returns the number of events waiting in the spool (the spool depth
// metric).
func (s *Spool) Depth() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return len(s.pending)
}

// Corrupt returns how many unreadable spool files were moved aside into the
// corrupt/ subdirectory since the spool was opened.
func (s *Spool) Corrupt() int {
	s.mu.Lock()
	defer s.mu.Unlock()
	return s.corrupt
}

// Append writes the encoded event data durably and returns its sequence
// number. data must be the JSON of a valid Event (Event.Marshal); it is what
// will be published, byte for byte.
func (s *Spool) Append(data []byte) (uint64, error) {
	seq, _, err := s.AppendRanked(data, 0)
	return seq, err
}

// write stores data as the file for seq: temporary file, fsync, rename,
// fsync of the directory (so that the rename itself is durable).
func (s *Spool) write(seq uint64, data []byte) error {
	f, err := os.CreateTemp(s.dir, spoolTmp+"*")
	if err != nil {
		return fmt.Errorf("spool alert: %w", err)
	}
	tmp := f.Name()
	fail := func(err error) error {
		_ = f.Close()
		_ = os.Remove(tmp)
		return fmt.Errorf("spool alert %s: %w", tmp, err)
	}
	if _, err := f.Write(data); err != nil {
		return fail(err)
	}
	if err := f.Sync(); err != nil {
		return fail(err)
	}
	if err := f.Close(); err != nil {
		return fail(err)
	}
	if err := os.Rename(tmp, s.path(seq)); err != nil {
		_ = os.Remove(tmp)
		return fmt.Errorf("spool alert: %w", err)
	}
	return syncDir(s.dir)
}

// Oldest returns the oldest pending event, or ok == false when the spool is
// empty. An unreadable file is moved aside, counted, and skipped.
func (s *Spool) Oldest() (e SpoolEntry, ok bool, err error) {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return SpoolEntry{}, false, ErrSpoolClosed
	}
	for len(s.pending) > 0 {
		seq := s.pending[0]
		data, err := os.ReadFile(s.path(seq))
		if errors.Is(err, os.ErrNotExist) {
			// Removed behind our back; nothing to send.
			s.pending = s.pending[1:]
			continue
		}
		if err != nil {
			return SpoolEntry{}, false, fmt.Errorf("read spooled alert: %w", err)
		}
		var ev Event
		if err := json.Unmarshal(data, &ev); err != nil || ev.Validate() != nil {
			s.moveAside(filepath.Base(s.path(seq)))
			s.pending = s.pending[1:]
			continue
		}
		return SpoolEntry{Seq: seq, Data: data, Event: ev}, true, nil
	}
	return SpoolEntry{}, false, nil
}

// Remove deletes the entry seq once it has been delivered. Removing an entry
// that is already gone is not an error.
func (s *Spool) Remove(seq uint64) error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return ErrSpoolClosed
	}
	if err := s.removeFile(seq); err != nil {
		return err
	}
	delete(s.ranks, seq)
	switch i := slices.Index(s.pending, seq); {
	case i == 0:
		// The usual case: the oldest was delivered. Re-slicing keeps a
		// replay of a full spool linear.
		s.pending = s.pending[1:]
	case i > 0:
		s.pending = slices.Delete(s.pending, i, i+1)
	}
	// The directory is not synced here: if the removal is lost in a crash,
	// the event is sent again with the same de-duplication id and the
	// stream drops it (or the publisher's last-message check catches it).
	return nil
}

// removeFile deletes the file of seq; a file already gone is no error.
func (s *Spool) removeFile(seq uint64) error {
	err := os.Remove(s.path(seq))
	if err != nil && !errors.Is(err, os.ErrNotExist) {
		return fmt.Errorf("remove delivered alert: %w", err)
	}
	return nil
}

// Close releases the spool directory. Pending events stay on disk for the
// next OpenSpool.
func (s *Spool) Close() error {
	s.mu.Lock()
	defer s.mu.Unlock()
	if s.closed {
		return nil
	}
	s.closed = true
	if err := s.lock.Close(); err != nil {
		return fmt.Errorf("close alert spool %s: %w", s.dir, err)
	}
	return nil
}

func (s *Spool) path(seq uint64) string {
	return filepath.Join(s.dir, fmt.Sprintf("%0*d%s", spoolDigits, seq, spoolSuffix))
}

// moveAside moves the file name into corrupt/ with a unique suffix, so that a
// person can look at it later, and counts it. A failure to move falls back to
// removing the file: a corrupt file must never block the queue behind it.
func (s *Spool) moveAside(name string) {
	s.corrupt++
	from := filepath.Join(s.dir, name)
	cdir := filepath.Join(s.dir, spoolCorrupt)
	if err := os.MkdirAll(cdir, 0o750); err == nil {
		to := filepath.Join(cdir, name+"."+strconv.FormatInt(time.Now().UnixNano(), 10))
		if os.Rename(from, to) == nil {
			return
		}
	}
	_ = os.Remove(from)
}

// syncDir fsyncs a directory so that a rename or create inside it survives a
// crash (POSIX leaves directory entries in the page cache otherwise).
func syncDir(dir string) error {
	d, err := os.Open(dir)
	if err != nil {
		return fmt.Errorf("sync spool directory: %w", err)
	}
	err = d.Sync()
	if cerr := d.Close(); err == nil {
		err = cerr
	}
	if err != nil {
		return fmt.Errorf("sync spool directory %s: %w", dir, err)
	}
	return nil
}
