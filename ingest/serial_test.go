package ingest

import (
	"os"
	"path/filepath"
	"testing"
	"time"

	"github.com/creack/pty"
	"golang.org/x/term"
)

// newPTY opens a pseudo-terminal pair and points link at its slave, the way
// a udev rule points a stable name at a USB serial adapter.
func newPTY(t *testing.T, link string) (master, tty *os.File) {
	t.Helper()
	master, tty, err := pty.Open()
	if err != nil {
		t.Fatal(err)
	}
	// Raw before the name appears, as a serial adapter has no line
	// discipline (and as trapline's simulator makes its own): a source
	// that opens the port the moment it appears could otherwise see the
	// first bytes through the terminal's cooked mode, which takes
	// control bytes of the binary framing for signals and end of file.
	if _, err := term.MakeRaw(int(tty.Fd())); err != nil {
		t.Fatal(err)
	}
	tmp := link + ".new"
	_ = os.Remove(tmp)
	if err := os.Symlink(tty.Name(), tmp); err != nil {
		t.Fatal(err)
	}
	if err := os.Rename(tmp, link); err != nil {
		t.Fatal(err)
	}
	return master, tty
}

func (c *collector) countStatus(st Status) int {
	n := 0
	for _, e := range c.statuses() {
		if e.Status == st {
			n++
		}
	}
	return n
}

// TestSerialUnplugged writes samples into a pseudo-terminal, closes it (the
// cable is pulled), and opens a new one behind the same symlink (the adapter
// is plugged in again, maybe as another device): the source reports the
// disconnection, reads again within 2 s with its default backoff, and
// reports the gap in the samples' times.
func TestSerialUnplugged(t *testing.T) {
	for _, f := range []Format{FormatText, FormatBinary} {
		t.Run(string(f), func(t *testing.T) {
			link := filepath.Join(t.TempDir(), "ttyLUNG")
			master, tty := newPTY(t, link)
			in := testSignal(400, 100, true)
			var enc Encoder
			if f == FormatText {
				enc, _ = NewTextEncoder(TextEncoderOptions{Volume: true, Stream: true})
			} else {
				enc, _ = NewBinaryEncoder(BinaryEncoderOptions{RateHz: 100, Time: true, Volume: true})
			}
			write := func(w *os.File, part []Sample) {
				b := append([]byte(nil), enc.Header()...)
				for _, s := range part {
					b = enc.Append(b, "bed-5", s)
				}
				writeChunks(t, w, b)
			}
			src, err := Open("serial://"+link+"?format="+string(f), Options{RateHz: 100})
			if err != nil {
				t.Fatal(err)
			}
			col := newCollector()
			running(t, src, col.sink)
			waitFor(t, 2*time.Second, "the port to open", func() bool { return col.countStatus(StatusConnected) == 1 })
			tty.Close() // only the source holds the slave now
			write(master, in[:150])
			waitFor(t, 5*time.Second, "the first 1.5 s of samples", func() bool { return col.count("bed-5") == 150 })

			master.Close() // cable pulled
			waitFor(t, 2*time.Second, "the disconnection", func() bool { return col.countStatus(StatusDisconnected) >= 1 })
			time.Sleep(300 * time.Millisecond) // a few reopen attempts fail meanwhile
			plugged := time.Now()
			master2, tty2 := newPTY(t, link)
			defer master2.Close()
			waitFor(t, 2*time.Second, "reading again", func() bool { return col.countStatus(StatusConnected) == 2 })
			t.Logf("reading again %v after the new device appeared", time.Since(plugged).Round(time.Millisecond))
			tty2.Close()
			write(master2, in[250:]) // the samples from 1.50 s to 2.49 s were lost
			waitFor(t, 5*time.Second, "the rest of the samples", func() bool { return col.count("bed-5") == 300 })

			got := col.get("bed-5")
			want := append(append([]Sample(nil), in[:150]...), in[250:]...)
			for i, s := range got {
				w := want[i]
				tol := 1e-12
				if f == FormatBinary {
					tol = 0.0005 // 0.001 cmH2O steps
				}
				if !near(s.TimeS, w.TimeS, 1e-9) || !near(s.PressureCmH2O, w.PressureCmH2O, tol) ||
					!near(s.FlowLPS, w.FlowLPS, tol) || !near(s.VolumeL, w.VolumeL, tol) {
					t.Fatalf("sample %d: %+v, want %+v", i, s, w)
				}
			}
			var gaps []float64
			for _, e := range col.statuses() {
				if e.Status == StatusGap {
					gaps = append(gaps, e.GapS)
				}
			}
			// Last sample before at 1.49 s, first after at 2.50 s, period
			// 0.01 s: 1.00 s of signal is missing.
			if len(gaps) != 1 || !near(gaps[0], 1.0, 1e-9) {
				t.Fatalf("gaps %v, want one of 1 s", gaps)
			}
			if st := src.Stats(); st.Reconnects != 1 || st.Gaps != 1 || st.Samples != 300 {
				t.Fatalf("stats %+v", st)
			}
		})
	}
}

// TestSerialCorruption sends a corrupted stream over a pseudo-terminal: every
// intact sample arrives through the serial source, and its counters of bad
// lines, bad frames and skipped bytes are exact.
func TestSerialCorruption(t *testing.T) {
	for _, f := range []Format{FormatText, FormatBinary} {
		t.Run(string(f), func(t *testing.T) {
			var data []byte
			var want []Sample
			var wantStats Stats
			if f == FormatText {
				var bad uint64
				data, want, bad = corruptText(t, 2000, 11)
				wantStats = Stats{BadLines: bad}
			} else {
				var runs, skipped uint64
				data, want, runs, skipped = corruptBinary(t, 2000, 12)
				wantStats = Stats{BadFrames: runs, SkippedBytes: skipped}
			}
			link := filepath.Join(t.TempDir(), "ttyNOISY")
			master, tty := newPTY(t, link)
			defer master.Close()
			// Time comes from the device (text) or the counter (binary) at
			// 100 Hz, and every corrupt sample leaves a hole: gaps are
			// expected and counted, nothing else.
			src, _ := Open("serial://"+link+"?format="+string(f), Options{RateHz: 100, Buffer: 4096})
			col := newCollector()
			running(t, src, col.sink)
			waitFor(t, 2*time.Second, "the port to open", func() bool { return col.countStatus(StatusConnected) == 1 })
			tty.Close()
			writeChunks(t, master, data)
			waitFor(t, 10*time.Second, "every intact sample", func() bool { return col.count("bed7") == len(want) })
			got := col.get("bed7")
			for i := range want {
				if !near(got[i].TimeS, want[i].TimeS, 1e-9) || !near(got[i].PressureCmH2O, want[i].PressureCmH2O, 0.0005) {
					t.Fatalf("sample %d: %+v, want %+v", i, got[i], want[i])
				}
			}
			st := src.Stats()
			wantStats.Samples = uint64(len(want))
			for i := 1; i < len(want); i++ {
				if want[i].TimeS-want[i-1].TimeS > 0.015 { // more than 1.5 periods: a hole
					wantStats.Gaps++
				}
			}
			if st != wantStats {
				t.Fatalf("stats %+v, want %+v", st, wantStats)
			}
			t.Logf("%d samples, stats %+v", len(want), st)
		})
	}
}
