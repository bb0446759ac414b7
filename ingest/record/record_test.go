package record

import (
	"bytes"
	"context"
	"math"
	"os"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"trapline/ingest"
)

// clock is a wall clock that tests move by hand.
type clock struct {
	mu sync.Mutex
	t  time.Time
}

func newClock() *clock { return &clock{t: time.Date(2026, 3, 1, 10, 0, 0, 0, time.UTC)} }

func (c *clock) Now() time.Time {
	c.mu.Lock()
	defer c.mu.Unlock()
	return c.t
}

func (c *clock) Add(d time.Duration) {
	c.mu.Lock()
	c.t = c.t.Add(d)
	c.mu.Unlock()
}

// waitFor polls cond for up to 5 s.
func waitFor(t *testing.T, what string, cond func() bool) {
	t.Helper()
	deadline := time.Now().Add(5 * time.Second)
	for !cond() {
		if time.Now().After(deadline) {
			t.Fatalf("timed out waiting for %s", what)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// wave returns n samples of a smooth made-up breathing signal at 100 Hz.
func wave(n int, offset float64) []ingest.Sample {
	out := make([]ingest.Sample, n)
	for i := range out {
		ts := float64(i) / 100
		out[i] = ingest.Sample{TimeS: ts, PressureCmH2O: 5 + offset + 10*math.Sin(ts), FlowLPS: 0.5 * math.Cos(ts), VolumeL: ingest.NoVolume}
	}
	return out
}

// chunks encodes samples with enc and cuts the bytes into reads of odd
// sizes, as a serial link delivers them.
func chunks(t *testing.T, enc ingest.Encoder, stream string, samples []ingest.Sample) [][]byte {
	t.Helper()
	b := append([]byte(nil), enc.Header()...)
	for _, s := range samples {
		b = enc.Append(b, stream, s)
	}
	var out [][]byte
	for i, size := 0, 7; i < len(b); i, size = i+size, size%97+13 {
		out = append(out, b[i:min(i+size, len(b))])
	}
	return out
}

// decodeAll decodes the concatenated reads directly: the reference the
// recording must reproduce.
func decodeAll(t *testing.T, src Source, reads [][]byte) []ingest.Sample {
	t.Helper()
	var out []ingest.Sample
	d, err := ingest.NewDecoder(src.Format, src.decoderOptions(), func(_ string, s ingest.Sample) { out = append(out, s) })
	if err != nil {
		t.Fatal(err)
	}
	for _, r := range reads {
		_, _ = d.Write(r)
	}
	d.Flush()
	return out
}

func sameSamples(a, b []ingest.Sample) bool {
	if len(a) != len(b) {
		return false
	}
	for i := range a {
		x, y := a[i], b[i]
		if x.TimeS != y.TimeS || x.PressureCmH2O != y.PressureCmH2O || x.FlowLPS != y.FlowLPS ||
			!(x.VolumeL == y.VolumeL || math.IsNaN(x.VolumeL) && math.IsNaN(y.VolumeL)) {
			return false
		}
	}
	return true
}

func openWriter(t *testing.T, opts Options) *Writer {
	t.Helper()
	w, err := Open(context.Background(), opts)
	if err != nil {
		t.Fatal(err)
	}
	t.Cleanup(func() { _ = w.Close() })
	return w
}

// TestRoundTrip records a text and a binary source across several segment
// windows and reads back, for each, exactly the samples that decoding the
// original bytes gives, and the same bytes record by record.
func TestRoundTrip(t *testing.T) {
	dir := t.TempDir()
	clk := newClock()
	w := openWriter(t, Options{Dir: dir, SegmentLength: time.Minute, Now: clk.Now})
	textEnc, _ := ingest.NewTextEncoder(ingest.TextEncoderOptions{})
	binEnc, _ := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: 100})
	srcs := []Source{
		{Stream: "bed-1", Format: ingest.FormatText, Columns: ingest.DefaultColumns},
		{Stream: "bed-2", Format: ingest.FormatBinary, RateHz: 100},
	}
	reads := [][][]byte{chunks(t, textEnc, "", wave(3000, 0)), chunks(t, binEnc, "bed-2", wave(3000, 1))}
	for i := 0; i < max(len(reads[0]), len(reads[1])); i++ {
		for k, src := range srcs {
			if i < len(reads[k]) && !w.Write(src, reads[k][i]) {
				t.Fatalf("read %d of %s dropped", i, src.Stream)
			}
		}
		clk.Add(200 * time.Millisecond)
	}
	w.End(srcs[0])
	if err := w.Close(); err != nil {
		t.Fatal(err)
	}
	st := w.Stats()
	if st.DroppedRecords != 0 || st.Degraded || st.Segments < 4 {
		t.Fatalf("stats %+v: want no drops and at least two segments per stream", st)
	}
	r, err := OpenReader(dir)
	if err != nil {
		t.Fatal(err)
	}
	for k, src := range srcs {
		var got []ingest.Sample
		if _, err := r.Samples(context.Background(), Filter{Stream: src.Stream}, nil, func(_ string, s ingest.Sample) { got = append(got, s) }); err != nil {
			t.Fatal(err)
		}
		want := decodeAll(t, src, reads[k])
		if len(want) != 3000 || !sameSamples(got, want) {
			t.Errorf("%s: got %d samples, want the %d of the original bytes", src.Stream, len(got), len(want))
		}
		var raw [][]byte
		_ = r.Records(context.Background(), Filter{Stream: src.Stream}, nil, func(s Source, rec Record) error {
			if s != src {
				t.Errorf("source %+v, want %+v", s, src)
			}
			if rec.Kind == KindData {
				raw = append(raw, append([]byte(nil), rec.Payload...))
			}
			return nil
		})
		if !bytes.Equal(bytes.Join(raw, nil), bytes.Join(reads[k], nil)) {
			t.Errorf("%s: recorded bytes differ from the bytes written", src.Stream)
		}
	}
	if s := r.Stats(); s.Truncated+s.Corrupt+s.BadSegments != 0 {
		t.Errorf("clean recording read with damage: %+v", s)
	}
}

// TestTimeRange reads only the records received within a range.
func TestTimeRange(t *testing.T) {
	dir := t.TempDir()
	clk := newClock()
	start := clk.Now()
	w := openWriter(t, Options{Dir: dir, SegmentLength: time.Minute, Now: clk.Now})
	src := Source{Stream: "a", Format: ingest.FormatText}
	for i := 0; i < 300; i++ { // one line per second for 5 min
		w.Write(src, []byte("0,1,2\n"))
		clk.Add(time.Second)
	}
	_ = w.Close()
	r, err := OpenReader(dir)
	if err != nil {
		t.Fatal(err)
	}
	n := 0
	f := Filter{From: start.Add(90 * time.Second), To: start.Add(150 * time.Second)}
	_ = r.Records(context.Background(), f, nil, func(_ Source, rec Record) error {
		if rec.Time.Before(f.From) || !rec.Time.Before(f.To) {
			t.Errorf("record at %v outside the range", rec.Time)
		}
		n++
		return nil
	})
	if n != 60 {
		t.Errorf("%d records in a 60 s range at one a second, want 60", n)
	}
}

// filesOnDisk lists the segment files of dir.
func filesOnDisk(t *testing.T, dir string) map[string]int64 {
	t.Helper()
	m, _ := filepath.Glob(filepath.Join(dir, "*"+SegmentExt))
	out := map[string]int64{}
	for _, p := range m {
		fi, err := os.Stat(p)
		if err != nil {
			t.Fatal(err)
		}
		out[filepath.Base(p)] = fi.Size()
	}
	return out
}

// checkIndex asserts that the index lists exactly the closed segment files
// on disk, with their sizes; up to maxOpen files may be open segments.
func checkIndex(t *testing.T, dir string, maxOpen int) {
	t.Helper()
	data, err := os.ReadFile(filepath.Join(dir, IndexName))
	if err != nil {
		t.Fatal(err)
	}
	segs, bad := parseIndex(data)
	files := filesOnDisk(t, dir)
	if bad != 0 || len(segs) > len(files) || len(segs) < len(files)-maxOpen {
		t.Fatalf("index lists %d segments (%d bad lines), disk has %d files with up to %d open", len(segs), bad, len(files), maxOpen)
	}
	for _, s := range segs {
		if size, ok := files[s.Name]; !ok || size != s.Bytes {
			t.Errorf("index entry %s (%d bytes) does not match the disk (%d bytes, present %v)", s.Name, s.Bytes, size, ok)
		}
	}
}

// TestRetention deletes the oldest segments by total size and by age.
func TestRetention(t *testing.T) {
	line := bytes.Repeat([]byte("1.000,5.0,0.0\n"), 70) // 980 bytes a read
	tests := []struct {
		name     string
		opts     Options
		wantMax  int // closed segments left at most
		checkAge time.Duration
	}{
		{name: "bytes", opts: Options{MaxBytes: 12_000}, wantMax: 4},
		{name: "age", opts: Options{MaxAge: 5 * time.Minute}, wantMax: 6, checkAge: 5 * time.Minute},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			dir := t.TempDir()
			clk := newClock()
			opts := tc.opts
			opts.Dir, opts.SegmentLength, opts.Now = dir, time.Minute, clk.Now
			w := openWriter(t, opts)
			src := Source{Stream: "s1", Format: ingest.FormatText}
			for i := 0; i < 60; i++ { // one read every 20 s for 20 min: 20 segments of 3 reads
				w.Write(src, line)
				clk.Add(20 * time.Second)
				waitFor(t, "the read to be written", func() bool { return w.Stats().Records == uint64(i+1) })
			}
			waitFor(t, "retention", func() bool { return w.Stats().Deleted > 0 && w.Stats().Segments <= tc.wantMax+1 })
			st := w.Stats()
			files := filesOnDisk(t, dir)
			var total int64
			for _, size := range files {
				total += size
			}
			if st.DiskBytes != total || st.Segments != len(files) {
				t.Errorf("stats say %d segments of %d bytes, disk has %d of %d", st.Segments, st.DiskBytes, len(files), total)
			}
			if tc.opts.MaxBytes > 0 && total > tc.opts.MaxBytes+3*1100 { // one open segment of 3 reads may exceed it
				t.Errorf("%d bytes on disk with a limit of %d", total, tc.opts.MaxBytes)
			}
			checkIndex(t, dir, 1)
			r, err := OpenReader(dir)
			if err != nil {
				t.Fatal(err)
			}
			segs := r.Segments()
			if tc.checkAge > 0 {
				for _, s := range segs[:len(segs)-1] {
					if age := clk.Now().Sub(s.Last); age > tc.checkAge {
						t.Errorf("segment %s is %v old, limit %v", s.Name, age, tc.checkAge)
					}
				}
			}
			if newest := segs[len(segs)-1]; newest.Last.Before(clk.Now().Add(-time.Minute)) {
				t.Errorf("the newest segment was deleted: last kept %v", newest.Last)
			}
		})
	}
}

// TestReopenAdoptsSegments restarts a writer on a directory whose last
// segment was never closed (no index entry) and keeps it under retention.
func TestReopenAdoptsSegments(t *testing.T) {
	dir := t.TempDir()
	clk := newClock()
	src := Source{Stream: "s1", Format: ingest.FormatText}
	f, err := os.Create(filepath.Join(dir, segmentName("s1", clk.Now(), 0)))
	if err != nil {
		t.Fatal(err)
	}
	b := appendHeader(nil, src, clk.Now())
	b = appendRecord(b, KindData, clk.Now(), []byte("0,5,0\n"))
	_, _ = f.Write(b)
	_ = f.Close()
	w := openWriter(t, Options{Dir: dir, Now: clk.Now})
	if st := w.Stats(); st.Segments != 1 || st.DiskBytes != int64(len(b)) {
		t.Fatalf("adopted %d segments of %d bytes, want 1 of %d", st.Segments, st.DiskBytes, len(b))
	}
	checkIndex(t, dir, 0)
}
