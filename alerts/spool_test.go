package alerts

import (
	"errors"
	"fmt"
	"os"
	"path/filepath"
	"testing"
	"time"
)

// testEvent returns a valid event numbered n of stream; its id is
// deterministic, as the lifecycle's ids are.
func testEvent(stream string, n int, state State) Event {
	seq := 100 + n
	return Event{
		ID: fmt.Sprintf("%s/air-trapping/%d", stream, n), Stream: stream,
		Condition: "air-trapping", Class: "physiological", Priority: Medium, State: state,
		Time: time.Date(2026, 11, 30, 8, 0, 0, 0, time.UTC).Add(time.Duration(n) * time.Second),
		TS:   float64(n) * 3, BreathSeq: &seq,
		Evidence: map[string]float64{"eef_lpm": 9.5, "trapped_ml": 300 + float64(n)},
		Message:  "expiratory flow has not returned to zero for 5 of the last 6 breaths",
	}
}

func mustMarshal(t testing.TB, ev Event) []byte {
	t.Helper()
	b, err := ev.Marshal()
	if err != nil {
		t.Fatal(err)
	}
	return b
}

// drainSpool pops every entry and returns their dedup ids in order.
func drainSpool(t *testing.T, s *Spool) []string {
	t.Helper()
	var ids []string
	for range 10_000 {
		e, ok, err := s.Oldest()
		if err != nil {
			t.Fatal(err)
		}
		if !ok {
			return ids
		}
		ids = append(ids, e.Event.DedupID())
		if err := s.Remove(e.Seq); err != nil {
			t.Fatal(err)
		}
	}
	t.Fatal("spool did not empty")
	return nil
}

func TestSpoolOrderAndReopen(t *testing.T) {
	dir := t.TempDir()
	s, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	var want []string
	for i := range 5 {
		ev := testEvent("bed-7", i, Raised)
		if _, err := s.Append(mustMarshal(t, ev)); err != nil {
			t.Fatal(err)
		}
		want = append(want, ev.DedupID())
	}
	if got := s.Depth(); got != 5 {
		t.Fatalf("depth %d, want 5", got)
	}
	// Deliver the first two, then "restart".
	for range 2 {
		e, ok, err := s.Oldest()
		if err != nil || !ok {
			t.Fatalf("oldest: %v %v", ok, err)
		}
		if err := s.Remove(e.Seq); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer s2.Close()
	if got := s2.Depth(); got != 3 {
		t.Fatalf("depth after reopen %d, want 3", got)
	}
	ev := testEvent("bed-7", 5, Raised)
	seq, err := s2.Append(mustMarshal(t, ev))
	if err != nil {
		t.Fatal(err)
	}
	if seq != 6 {
		t.Errorf("sequence after reopen %d, want 6 (continues after 5)", seq)
	}
	want = append(want[2:], ev.DedupID())
	got := drainSpool(t, s2)
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("order\n got %v\nwant %v", got, want)
	}
}

func TestSpoolFullRefusesAndKeepsOlder(t *testing.T) {
	s, err := OpenSpool(t.TempDir(), 3)
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	for i := range 3 {
		if _, err := s.Append(mustMarshal(t, testEvent("bed-1", i, Raised))); err != nil {
			t.Fatal(err)
		}
	}
	_, err = s.Append(mustMarshal(t, testEvent("bed-1", 3, Raised)))
	if !errors.Is(err, ErrSpoolFull) {
		t.Fatalf("append to full spool: %v, want ErrSpoolFull", err)
	}
	got := drainSpool(t, s)
	want := []string{"bed-1/air-trapping/0#raised", "bed-1/air-trapping/1#raised", "bed-1/air-trapping/2#raised"}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("kept %v, want the three older events %v", got, want)
	}
	if _, err := s.Append(mustMarshal(t, testEvent("bed-1", 4, Raised))); err != nil {
		t.Errorf("append after draining: %v", err)
	}
}

func TestSpoolOpenCleansUp(t *testing.T) {
	dir := t.TempDir()
	s, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	for i := range 3 {
		if _, err := s.Append(mustMarshal(t, testEvent("bed-2", i, Raised))); err != nil {
			t.Fatal(err)
		}
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	// A crash inside Append leaves a temporary file; a disk fault or a
	// person leaves garbage in a numbered file.
	if err := os.WriteFile(filepath.Join(dir, spoolTmp+"123"), []byte(`{"type":"al`), 0o600); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, fmt.Sprintf("%020d.json", 2)), []byte("not json"), 0o600); err != nil {
		t.Fatal(err)
	}
	if err := os.WriteFile(filepath.Join(dir, "notanumber.json"), []byte("{}"), 0o600); err != nil {
		t.Fatal(err)
	}
	s, err = OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	defer s.Close()
	got := drainSpool(t, s)
	want := []string{"bed-2/air-trapping/0#raised", "bed-2/air-trapping/2#raised"}
	if fmt.Sprint(got) != fmt.Sprint(want) {
		t.Errorf("drained %v, want %v", got, want)
	}
	if s.Corrupt() != 2 {
		t.Errorf("corrupt count %d, want 2", s.Corrupt())
	}
	if _, err := os.Stat(filepath.Join(dir, spoolTmp+"123")); !errors.Is(err, os.ErrNotExist) {
		t.Errorf("temporary file left behind: %v", err)
	}
	aside, err := os.ReadDir(filepath.Join(dir, spoolCorrupt))
	if err != nil || len(aside) != 2 {
		t.Errorf("corrupt/ holds %d files (%v), want 2", len(aside), err)
	}
}

func TestSpoolLock(t *testing.T) {
	dir := t.TempDir()
	s, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatal(err)
	}
	if _, err := OpenSpool(dir, 0); !errors.Is(err, ErrSpoolLocked) {
		t.Fatalf("second open: %v, want ErrSpoolLocked", err)
	}
	if err := s.Close(); err != nil {
		t.Fatal(err)
	}
	s2, err := OpenSpool(dir, 0)
	if err != nil {
		t.Fatalf("open after close: %v", err)
	}
	_ = s2.Close()
	if _, err := s.Append([]byte("{}")); !errors.Is(err, ErrSpoolClosed) {
		t.Errorf("append after close: %v, want ErrSpoolClosed", err)
	}
}

func TestOpenSpoolErrors(t *testing.T) {
	file := filepath.Join(t.TempDir(), "file")
	if err := os.WriteFile(file, nil, 0o600); err != nil {
		t.Fatal(err)
	}
	for _, tc := range []struct{ name, dir string }{
		{"empty", ""},
		{"file in the way", file},
	} {
		t.Run(tc.name, func(t *testing.T) {
			if s, err := OpenSpool(tc.dir, 0); err == nil {
				_ = s.Close()
				t.Fatalf("OpenSpool(%q) succeeded", tc.dir)
			}
		})
	}
}

// FuzzSpoolRead feeds arbitrary file contents to the spool reader: it must
// never panic, and must either return a valid event or move the file aside.
func FuzzSpoolRead(f *testing.F) {
	seeds, err := filepath.Glob(filepath.Join("testdata", "spool", "*.json"))
	if err != nil || len(seeds) == 0 {
		f.Fatalf("no seeds in testdata/spool: %v", err)
	}
	for _, p := range seeds {
		b, err := os.ReadFile(p)
		if err != nil {
			f.Fatal(err)
		}
		f.Add(b)
	}
	f.Fuzz(func(t *testing.T, data []byte) {
		dir := t.TempDir()
		if err := os.WriteFile(filepath.Join(dir, fmt.Sprintf("%020d.json", 1)), data, 0o600); err != nil {
			t.Fatal(err)
		}
		s, err := OpenSpool(dir, 0)
		if err != nil {
			t.Fatal(err)
		}
		defer s.Close()
		e, ok, err := s.Oldest()
		if err != nil {
			t.Fatal(err)
		}
		if ok {
			if err := e.Event.Validate(); err != nil {
				t.Fatalf("returned an invalid event: %v", err)
			}
			return
		}
		if s.Corrupt() != 1 || s.Depth() != 0 {
			t.Fatalf("unreadable file: corrupt %d depth %d, want 1 and 0", s.Corrupt(), s.Depth())
		}
	})
}

func BenchmarkSpoolAppend(b *testing.B) {
	s, err := OpenSpool(b.TempDir(), 1<<30)
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	data := mustMarshal(b, testEvent("bed-9", 1, Raised))
	b.ReportAllocs()
	for b.Loop() {
		if _, err := s.Append(data); err != nil {
			b.Fatal(err)
		}
	}
}

// BenchmarkSpoolReplay measures reading and removing spooled events oldest
// first, as the drainer does after an outage, per event.
func BenchmarkSpoolReplay(b *testing.B) {
	dir := b.TempDir()
	s, err := OpenSpool(dir, 1<<30)
	if err != nil {
		b.Fatal(err)
	}
	defer s.Close()
	data := mustMarshal(b, testEvent("bed-9", 1, Raised))
	// Fill without the fsyncs: the benchmark is about the read side.
	for i := range b.N {
		if err := os.WriteFile(s.path(uint64(i+1)), data, 0o600); err != nil {
			b.Fatal(err)
		}
		s.pending = append(s.pending, uint64(i+1))
	}
	b.ResetTimer()
	for range b.N {
		e, ok, err := s.Oldest()
		if err != nil || !ok {
			b.Fatalf("oldest: %v %v", ok, err)
		}
		if err := s.Remove(e.Seq); err != nil {
			b.Fatal(err)
		}
	}
}
