package record

import (
	"context"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"trapline/ingest"
)

// quotaFS creates real files whose writes fail with ENOSPC once the bytes
// written through it reach a quota, as on a full disk; Free lifts it.
type quotaFS struct {
	left atomic.Int64
}

type quotaFile struct {
	*os.File
	fs *quotaFS
}

func (q *quotaFS) Create(p string) (File, error) {
	if q.left.Load() <= 0 {
		return nil, &os.PathError{Op: "open", Path: p, Err: syscall.ENOSPC}
	}
	f, err := os.OpenFile(p, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o640)
	if err != nil {
		return nil, err
	}
	return quotaFile{f, q}, nil
}

func (f quotaFile) Write(p []byte) (int, error) {
	left := f.fs.left.Add(-int64(len(p)))
	if left < 0 {
		n := max(0, len(p)+int(left))
		_, _ = f.File.Write(p[:n])
		f.fs.left.Store(0)
		return n, &os.PathError{Op: "write", Path: f.Name(), Err: syscall.ENOSPC}
	}
	return f.File.Write(p)
}

// stateLog keeps what OnState reported.
type stateLog struct {
	mu   sync.Mutex
	list []Stats
}

func (l *stateLog) add(s Stats) { l.mu.Lock(); l.list = append(l.list, s); l.mu.Unlock() }

func (l *stateLog) last() (Stats, bool) {
	l.mu.Lock()
	defer l.mu.Unlock()
	if len(l.list) == 0 {
		return Stats{}, false
	}
	return l.list[len(l.list)-1], true
}

// fullDisk runs the full-disk story on a writer whose files come from
// create: writes fail, the writer reports degraded, keeps accepting and
// counts what it drops; after free() and the retry period it writes again
// and reports healthy.
func fullDisk(t *testing.T, dir string, create func(string) (File, error), free func()) {
	clk := newClock()
	var log stateLog
	w := openWriter(t, Options{Dir: dir, Now: clk.Now, Create: create, OnState: log.add, RetryEvery: 10 * time.Second})
	src := Source{Stream: "bed-1", Format: ingest.FormatText}
	line := make([]byte, 1000)
	for i := range line {
		line[i] = '0' + byte(i%10)
	}
	for i := 0; i < 200; i++ {
		if !w.Write(src, line) {
			t.Fatalf("write %d refused: the writer must keep accepting", i)
		}
		if i%20 == 0 {
			time.Sleep(time.Millisecond)
		}
	}
	waitFor(t, "the degraded report", func() bool { s, ok := log.last(); return ok && s.Degraded })
	waitFor(t, "all reads handled", func() bool { s := w.Stats(); return s.Records+s.DroppedRecords == 200 })
	s := w.Stats()
	if s.WriteErrors == 0 || s.DroppedRecords == 0 || s.DroppedBytes != 1000*s.DroppedRecords {
		t.Fatalf("full disk: %+v: want write errors and dropped records counted", s)
	}
	if !strings.Contains(s.Reason, syscall.ENOSPC.Error()) {
		t.Fatalf("reason %q does not name the full disk", s.Reason)
	}
	free()
	clk.Add(11 * time.Second)
	before := s.Records
	w.Write(src, line)
	waitFor(t, "writes to resume", func() bool { return w.Stats().Records > before })
	waitFor(t, "the healthy report", func() bool { s, ok := log.last(); return ok && !s.Degraded })
}

// TestFullDiskQuota plays a full disk with a byte quota on real files.
func TestFullDiskQuota(t *testing.T) {
	q := &quotaFS{}
	q.left.Store(20_000)
	fullDisk(t, t.TempDir(), q.Create, func() { q.left.Store(1 << 30) })
}

// TestFullDiskTmpfs fills a real 64 KiB tmpfs. It needs root and a kernel
// that allows the mount; elsewhere it is skipped.
func TestFullDiskTmpfs(t *testing.T) {
	if os.Geteuid() != 0 {
		t.Skip("mounting a tmpfs needs root")
	}
	dir := t.TempDir()
	if out, err := exec(t, "mount", "-t", "tmpfs", "-o", "size=64k", "tmpfs", dir); err != nil {
		t.Skipf("cannot mount a tmpfs: %v: %s", err, out)
	}
	t.Cleanup(func() { _, _ = exec(t, "umount", dir) })
	// Leave about 16 KiB free: a filler file takes the rest.
	filler := filepath.Join(dir, "filler")
	if err := os.WriteFile(filler, make([]byte, 48<<10), 0o600); err != nil {
		t.Fatal(err)
	}
	rec := filepath.Join(dir, "rec")
	fullDisk(t, rec, nil, func() { _ = os.Remove(filler) })
}

// TestOverflow blocks the disk so that the buffer fills: reads beyond it
// are refused at once and counted, and the writer reports degraded.
func TestOverflow(t *testing.T) {
	release := make(chan struct{})
	var log stateLog
	create := func(p string) (File, error) {
		if filepath.Base(p) != IndexName+".tmp" {
			<-release
		}
		return os.OpenFile(p, os.O_CREATE|os.O_EXCL|os.O_WRONLY, 0o640)
	}
	clk := newClock()
	w := openWriter(t, Options{Dir: t.TempDir(), Now: clk.Now, Create: create, BufferBytes: 10_000, OnState: log.add})
	// Unblock the disk before the writer is closed (cleanups run last
	// first), so that a failing check cannot leave Close waiting forever.
	var once sync.Once
	unblock := func() { once.Do(func() { close(release) }) }
	t.Cleanup(unblock)
	src := Source{Stream: "s", Format: ingest.FormatBinary}
	accepted, refused := 0, 0
	start := time.Now()
	for i := 0; i < 100; i++ {
		if w.Write(src, make([]byte, 900)) {
			accepted++
		} else {
			refused++
		}
	}
	if el := time.Since(start); el > time.Second {
		t.Errorf("100 writes took %v against a blocked disk: the writer must not block", el)
	}
	// The buffer holds 10 entries. The writer takes what is queued when it
	// wakes and then blocks on the disk, so up to 10 more may have left
	// the buffer before it blocked: at most 20 are accepted.
	if refused == 0 || accepted > 20 {
		t.Fatalf("accepted %d, refused %d with a 10 kB buffer of 964-byte entries", accepted, refused)
	}
	unblock()
	waitFor(t, "the overflow report", func() bool { s, ok := log.last(); return ok && s.Degraded && s.Reason == ErrOverflow.Error() })
	s := w.Stats()
	if s.DroppedRecords != uint64(refused) || s.DroppedBytes != uint64(900*refused) {
		t.Errorf("dropped %d records, %d bytes; want %d and %d", s.DroppedRecords, s.DroppedBytes, refused, 900*refused)
	}
	clk.Add(11 * time.Second)
	waitFor(t, "the healthy report", func() bool { s, ok := log.last(); return ok && !s.Degraded })
}

// writeSegment writes a segment of n records and returns its path and
// the offsets where each record starts.
func writeSegment(t *testing.T, n int) (string, []int) {
	dir := t.TempDir()
	src := Source{Stream: "s", Format: ingest.FormatText}
	t0 := time.Unix(1_700_000_000, 0)
	b := appendHeader(nil, src, t0)
	var offs []int
	for i := 0; i < n; i++ {
		offs = append(offs, len(b))
		b = appendRecord(b, KindData, t0.Add(time.Duration(i)*time.Second), []byte("0.01,5.0,0.5\n"))
	}
	p := filepath.Join(dir, segmentName("s", t0, 0))
	if err := os.WriteFile(p, b, 0o600); err != nil {
		t.Fatal(err)
	}
	return p, offs
}

// TestDamagedSegment reads the records before a truncated or corrupt
// record, and counts the damage instead of failing.
func TestDamagedSegment(t *testing.T) {
	tests := []struct {
		name                       string
		damage                     func(b []byte, offs []int) []byte
		wantRecords                uint64
		wantTruncated, wantCorrupt int
	}{
		{"truncated tail", func(b []byte, offs []int) []byte { return b[:len(b)-5] }, 9, 1, 0},
		{"cut inside the record head", func(b []byte, offs []int) []byte { return b[:offs[9]+3] }, 9, 1, 0},
		{"flipped payload byte", func(b []byte, offs []int) []byte { b[offs[6]+15] ^= 1; return b }, 6, 0, 1},
		{"huge length", func(b []byte, offs []int) []byte { b[offs[4]+3] = 0xff; return b }, 4, 0, 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			p, offs := writeSegment(t, 10)
			b, _ := os.ReadFile(p)
			if err := os.WriteFile(p, tc.damage(b, offs), 0o600); err != nil {
				t.Fatal(err)
			}
			r, err := OpenReader(filepath.Dir(p))
			if err != nil {
				t.Fatal(err)
			}
			st, err := r.Samples(context.Background(), Filter{}, nil, func(string, ingest.Sample) {})
			if err != nil {
				t.Fatal(err)
			}
			if st.Scan.Records != tc.wantRecords || st.Scan.Truncated != tc.wantTruncated || st.Scan.Corrupt != tc.wantCorrupt {
				t.Errorf("scan %+v: want %d records, %d truncated, %d corrupt", st.Scan, tc.wantRecords, tc.wantTruncated, tc.wantCorrupt)
			}
			if st.Decode.Samples != tc.wantRecords {
				t.Errorf("%d samples decoded, want %d", st.Decode.Samples, tc.wantRecords)
			}
		})
	}
}

// TestNotASegment skips a file with a damaged header and counts it.
func TestNotASegment(t *testing.T) {
	p, _ := writeSegment(t, 3)
	b, _ := os.ReadFile(p)
	b[20] ^= 0xff
	_ = os.WriteFile(p, b, 0o600)
	r, err := OpenReader(filepath.Dir(p))
	if err != nil {
		t.Fatal(err)
	}
	if len(r.Segments()) != 0 || r.Stats().BadSegments != 1 {
		t.Errorf("segments %v, stats %+v: want the file skipped and counted", r.Segments(), r.Stats())
	}
}
