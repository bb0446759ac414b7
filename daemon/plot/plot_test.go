package plot

import (
	"bytes"
	"encoding/xml"
	"errors"
	"image/png"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/daemon/internal/simrun"
	"trapline/ingest"
)

var (
	runOnce sync.Once
	runData Data
	runErr  error
)

// scenario returns the default demo scenario (bronchospasm, 18 simulated
// minutes) analysed offline: samples, breaths and alert events.
func scenario(t testing.TB) Data {
	t.Helper()
	runOnce.Do(func() {
		r, err := simrun.Run("bronchospasm", 0)
		if err != nil {
			runErr = err
			return
		}
		runData = Data{Stream: r.Stream, Samples: r.Samples, Breaths: r.Breaths, Alerts: r.Alerts}
	})
	if runErr != nil {
		t.Fatal(runErr)
	}
	return runData
}

// classCounts parses the SVG (which must be well-formed XML) and counts the
// elements of each class.
func classCounts(t *testing.T, svg []byte) map[string]int {
	t.Helper()
	counts := map[string]int{}
	dec := xml.NewDecoder(bytes.NewReader(svg))
	for {
		tok, err := dec.Token()
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatalf("SVG is not well-formed: %v", err)
		}
		if se, ok := tok.(xml.StartElement); ok {
			for _, a := range se.Attr {
				if a.Name.Local == "class" {
					counts[a.Value]++
				}
			}
		}
	}
	return counts
}

// alarmIntervals counts, straight from the events, the alarms that overlap
// [from, to] and the priorities they take there: an alarm is a raise and
// every id that supersedes it (docs/detectors.md), from its first event to
// its clearing or, still open, to the end.
func alarmIntervals(events []alerts.Event, from, to float64) (alarms int, prios map[alerts.Priority]bool) {
	type span struct {
		start, end float64
		open       bool
		prio       []alerts.Priority
		times      []float64
	}
	root := map[string]*span{}
	var all []*span
	for _, ev := range events {
		s := root[ev.ID]
		if s == nil {
			s = root[ev.Supersedes]
		}
		if s == nil {
			s = &span{start: ev.TS, open: true}
			all = append(all, s)
		}
		root[ev.ID] = s
		if ev.State == alerts.Cleared {
			s.open, s.end = false, ev.TS
		} else {
			s.prio, s.times = append(s.prio, ev.Priority), append(s.times, ev.TS)
		}
	}
	prios = map[alerts.Priority]bool{}
	for _, s := range all {
		end := s.end
		if s.open {
			end = to
		}
		if end < from || s.start > to {
			continue
		}
		alarms++
		for i, p := range s.prio {
			next := end
			if i+1 < len(s.times) {
				next = s.times[i+1]
			}
			if next >= from && s.times[i] <= to && next > s.times[i] {
				prios[p] = true
			}
		}
	}
	return alarms, prios
}

// TestRecordingSVGStructure: the SVG holds the three waveforms and both
// trends, exactly one breath-start line per breath in each waveform panel,
// one end-expiratory flow point per breath, one trend point per breath with
// a value, and one outlined band per alarm with stretches of each priority
// it took. The expected counts come from the records, not from the plot.
func TestRecordingSVGStructure(t *testing.T) {
	d := scenario(t)
	for _, rng := range []struct{ from, to float64 }{{0, 0}, {290, 620}, {700, 760}, {900, 0}} {
		var buf bytes.Buffer
		if err := Recording(&buf, "svg", d, Options{FromS: rng.from, ToS: rng.to}); err != nil {
			t.Fatal(err)
		}
		from, to := rng.from, rng.to
		switch {
		case from == 0 && to == 0:
			from, to = d.Samples[0].TimeS, d.Samples[len(d.Samples)-1].TimeS
		case to == 0:
			to = d.Samples[len(d.Samples)-1].TimeS
		}
		var starts, eef, peepi, trapped int
		for _, b := range d.Breaths {
			if b.StartS >= from && b.StartS <= to {
				starts++
			}
			if b.EndS >= from && b.EndS <= to {
				eef += boolInt(finite(b.EndExpFlowLPM))
				peepi += boolInt(finite(b.PEEPiCmH2O))
				trapped += boolInt(finite(b.TrappedML))
			}
		}
		if starts < 10 {
			t.Fatalf("range %g–%g s: only %d breaths; the test needs more", from, to, starts)
		}
		got := classCounts(t, buf.Bytes())
		want := map[string]int{
			"breath-start pressure": starts, "breath-start flow": starts, "breath-start volume": starts,
			"eef": eef, "peepi": peepi, "trapped": trapped,
		}
		alarms, prios := alarmIntervals(d.Alerts, from, to)
		want["alarm"] = alarms
		for k, n := range want {
			if got[k] != n {
				t.Errorf("range %g–%g s: %d elements of class %q, want %d", from, to, got[k], k, n)
			}
		}
		for _, series := range []string{"pressure", "flow", "volume", "peepi-line", "trapped-line"} {
			if got[series] == 0 {
				t.Errorf("range %g–%g s: no %s series", from, to, series)
			}
		}
		for _, p := range []alerts.Priority{alerts.High, alerts.Medium, alerts.Low} {
			if n := got["alarm-segment priority-"+string(p)]; (n > 0) != prios[p] {
				t.Errorf("range %g–%g s: %d %s-priority stretches, want them %v", from, to, n, p, prios[p])
			}
		}
		for _, unit := range []string{"(cmH2O)", "(L/min)", "(mL)", "time (s)"} {
			if !strings.Contains(buf.String(), unit) {
				t.Errorf("range %g–%g s: no axis with %s", from, to, unit)
			}
		}
		t.Logf("range %g–%g s: %d breaths, %d alarms, %d bytes", from, to, starts, alarms, buf.Len())
	}
}

func boolInt(b bool) int {
	if b {
		return 1
	}
	return 0
}

// TestRecordingPNG: the PNG decodes and has the size asked for (200 mm at
// 100 dpi is 787 pixels: 200 / 25.4 × 100).
func TestRecordingPNG(t *testing.T) {
	d := scenario(t)
	var buf bytes.Buffer
	if err := Recording(&buf, "PNG", d, Options{FromS: 300, ToS: 360, DPI: 100}); err != nil {
		t.Fatal(err)
	}
	img, err := png.Decode(&buf)
	if err != nil {
		t.Fatal(err)
	}
	if b := img.Bounds(); b.Dx() != 787 || b.Dy() != 1102 {
		t.Errorf("PNG is %d × %d pixels, want 787 × 1102", b.Dx(), b.Dy())
	}
}

// TestRecordingBadInput: bad requests are errors, never a panic.
func TestRecordingBadInput(t *testing.T) {
	d := scenario(t)
	cases := []struct {
		name   string
		format string
		data   Data
		opts   Options
	}{
		{"format", "gif", d, Options{}},
		{"empty", "svg", Data{Stream: "x"}, Options{}},
		{"range outside", "svg", d, Options{FromS: 5000, ToS: 6000}},
		{"NaN range", "svg", d, Options{FromS: math.NaN(), ToS: 10}},
		{"tiny", "png", d, Options{Width: 1, Height: 1}},
		{"columns", "svg", d, Options{Columns: 3}},
		{"dpi", "png", d, Options{DPI: 5000}},
		{"end before start", "svg", d, Options{FromS: 300, ToS: 200}},
		{"start after the end", "svg", d, Options{FromS: 5000}},
	}
	for _, c := range cases {
		t.Run(c.name, func(t *testing.T) {
			err := Recording(io.Discard, c.format, c.data, c.opts)
			if c.name == "range outside" {
				// A range with no samples still draws (empty panels), but
				// must not fail on it.
				if err != nil {
					t.Errorf("range without data: %v", err)
				}
				return
			}
			if err == nil {
				t.Errorf("no error")
			}
		})
	}
}

// TestDecimateKeepsExtremes: min/max decimation of an hour of a 100 Hz
// sine keeps, for every column, exactly the smallest and largest sample of
// that column (compared with a brute-force pass), draws at most two points
// per column, and keeps the sine's peaks of ±1 (sin(π/2) = 1).
func TestDecimateKeepsExtremes(t *testing.T) {
	const hz, dur, cols = 100.0, 3600.0, 1000
	n := int(hz * dur)
	ss := make([]ingest.Sample, n)
	for i := range ss {
		ts := float64(i) / hz
		ss[i] = ingest.Sample{TimeS: ts, FlowLPS: math.Sin(2 * math.Pi * ts / 3.7)}
	}
	val := func(i int) float64 { return ss[i].FlowLPS }
	w := decimate(ss, 0, dur, cols, val)
	if len(w) != 1 {
		t.Fatalf("%d runs, want 1 (no gap)", len(w))
	}
	if len(w[0]) > 2*(cols+1) {
		t.Errorf("%d points for %d columns", len(w[0]), cols)
	}
	colS := dur / cols
	lo, hi := make([]float64, cols+1), make([]float64, cols+1)
	for i := range lo {
		lo[i], hi[i] = math.Inf(1), math.Inf(-1)
	}
	for i := range ss {
		c := int(ss[i].TimeS / colS)
		lo[c], hi[c] = math.Min(lo[c], val(i)), math.Max(hi[c], val(i))
	}
	glo, ghi := make([]float64, cols+1), make([]float64, cols+1)
	for i := range glo {
		glo[i], ghi[i] = math.Inf(1), math.Inf(-1)
	}
	for _, p := range w[0] {
		c := int(p.X / colS)
		glo[c], ghi[c] = math.Min(glo[c], p.Y), math.Max(ghi[c], p.Y)
	}
	for c := range lo {
		if lo[c] != glo[c] || hi[c] != ghi[c] {
			t.Fatalf("column %d: drawn %g..%g, samples %g..%g", c, glo[c], ghi[c], lo[c], hi[c])
		}
	}
	mn, mx := math.Inf(1), math.Inf(-1)
	for _, p := range w[0] {
		mn, mx = math.Min(mn, p.Y), math.Max(mx, p.Y)
	}
	if mx < 0.9999 || mn > -0.9999 {
		t.Errorf("peaks %g..%g, want ±1", mn, mx)
	}
}

// TestDecimateSplitsAtGaps: a gap in the recording ends a run, and a short
// range is drawn sample for sample.
func TestDecimateSplitsAtGaps(t *testing.T) {
	var ss []ingest.Sample
	for i := range 200 {
		ts := float64(i) / 100
		if i >= 100 {
			ts += 5 // five seconds without samples
		}
		ss = append(ss, ingest.Sample{TimeS: ts, PressureCmH2O: float64(i)})
	}
	w := decimate(ss, 0, 10, 1000, func(i int) float64 { return ss[i].PressureCmH2O })
	if len(w) != 2 || len(w[0]) != 100 || len(w[1]) != 100 {
		t.Errorf("runs %d (%d, %d points), want 2 of 100", len(w), len(w[0]), len(w[len(w)-1]))
	}
}

// TestVolumeIntegration checks the volume trace against closed forms: a
// half sine of flow A·sin(πt/T) over T seconds moves A·2T/π litres
// (∫₀ᵀ sin(πt/T) dt = 2T/π), a constant flow F for t seconds moves F·t, and
// each breath starts again at zero.
func TestVolumeIntegration(t *testing.T) {
	const hz = 100.0
	const a, tIn = 0.5, 1.0 // L/s, s
	var ss []ingest.Sample
	for i := 0; i <= 400; i++ {
		ts := float64(i) / hz
		f := 0.0
		switch {
		case ts <= tIn:
			f = a * math.Sin(math.Pi*ts/tIn)
		case ts >= 2 && ts <= 3:
			f = 0.25 // second breath: constant flow
		}
		ss = append(ss, ingest.Sample{TimeS: ts, FlowLPS: f, VolumeL: ingest.NoVolume})
	}
	b1, b2 := analyze.NewBreath(), analyze.NewBreath()
	b1.StartS, b2.StartS = 0, 2
	vol := volumesML(ss, []analyze.Breath{b1, b2})
	if want := a * 2 * tIn / math.Pi * 1000; math.Abs(vol[100]-want) > 0.1 {
		t.Errorf("volume after the half sine %.3f mL, want %.3f", vol[100], want)
	}
	if vol[200] != 0 {
		t.Errorf("volume at the second breath's start %g mL, want 0", vol[200])
	}
	if want := 0.25 * 1 * 1000; math.Abs(vol[300]-want) > 1e-6 {
		t.Errorf("volume after 1 s at 0.25 L/s %.3f mL, want %.0f", vol[300], want)
	}
	// A device volume is drawn as given.
	for i := range ss {
		ss[i].VolumeL = 0.123
	}
	if v := volumesML(ss, nil); v[50] != 123 {
		t.Errorf("device volume drawn as %g mL, want 123", v[50])
	}
}

// TestSelect keeps one stream's records.
func TestSelect(t *testing.T) {
	b := []analyze.Breath{{Stream: "a"}, {Stream: "b"}, {Stream: "a"}}
	e := []alerts.Event{{Stream: "b"}, {Stream: "a"}}
	d := Select("a", nil, b, e)
	if len(d.Breaths) != 2 || len(d.Alerts) != 1 || d.Stream != "a" {
		t.Errorf("Select: %d breaths, %d alerts", len(d.Breaths), len(d.Alerts))
	}
}

// TestDocsImage writes the picture of docs/img/plot.png (the default
// scenario while air trapping builds) when TRAPLINE_UPDATE_TESTDATA=1, and
// otherwise checks that the file is there and is a PNG.
func TestDocsImage(t *testing.T) {
	path := filepath.Join("..", "..", "docs", "img", "plot.png")
	if os.Getenv("TRAPLINE_UPDATE_TESTDATA") == "1" {
		var buf bytes.Buffer
		if err := Recording(&buf, "png", scenario(t), Options{FromS: 240, ToS: 720, DPI: 110}); err != nil {
			t.Fatal(err)
		}
		if err := os.WriteFile(path, buf.Bytes(), 0o644); err != nil {
			t.Fatal(err)
		}
	}
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if _, err := png.Decode(f); err != nil {
		t.Errorf("%s: %v", path, err)
	}
}

// TestTrendBreaks: a trend line is broken at a breath without a value and
// where breaths do not follow each other; every value is still a point.
func TestTrendBreaks(t *testing.T) {
	mk := func(start, end, v float64) *analyze.Breath {
		b := analyze.NewBreath()
		b.StartS, b.EndS, b.PEEPiCmH2O = start, end, v
		return &b
	}
	bs := []*analyze.Breath{mk(0, 3, 1), mk(3, 6, 2), mk(6, 9, math.NaN()), mk(9, 12, 3), mk(12, 15, 4), mk(40, 43, 5)}
	runs := trend(bs, func(b *analyze.Breath) float64 { return b.PEEPiCmH2O })
	var lens []int
	for _, r := range runs {
		lens = append(lens, len(r))
	}
	if len(lens) != 3 || lens[0] != 2 || lens[1] != 2 || lens[2] != 1 {
		t.Errorf("runs of %v points, want [2 2 1]", lens)
	}
}

// TestAlarmBandsFromEvents: hand-made events of two alarms, one of them
// escalated under a new id and acknowledged, give two outlined bands, a
// stretch per priority, and one acknowledgement mark.
func TestAlarmBandsFromEvents(t *testing.T) {
	var ss []ingest.Sample
	for i := range 6000 {
		ss = append(ss, ingest.Sample{TimeS: float64(i) / 100, VolumeL: ingest.NoVolume})
	}
	ev := func(id string, st alerts.State, p alerts.Priority, ts float64, sup string) alerts.Event {
		return alerts.Event{ID: id, Stream: "s", Condition: "air-trapping", State: st, Priority: p, TS: ts, Supersedes: sup}
	}
	events := []alerts.Event{
		ev("a1", alerts.Raised, alerts.Low, 5, ""),
		ev("a1", alerts.Escalated, alerts.Medium, 10, ""),
		ev("a2", alerts.Raised, alerts.High, 20, "a1"),
		ev("a2", alerts.Acknowledged, alerts.High, 25, ""),
		ev("a2", alerts.Cleared, alerts.High, 30, ""),
		ev("b1", alerts.Raised, alerts.Medium, 40, ""),
	}
	events[5].Condition = "signal-lost"
	var buf bytes.Buffer
	if err := Recording(&buf, "svg", Data{Stream: "s", Samples: ss, Alerts: events}, Options{}); err != nil {
		t.Fatal(err)
	}
	got := classCounts(t, buf.Bytes())
	want := map[string]int{"alarm": 2, "alarm-ack": 1, "alarm-segment priority-low": 1,
		"alarm-segment priority-medium": 2, "alarm-segment priority-high": 1}
	for k, n := range want {
		if got[k] != n {
			t.Errorf("%d elements of class %q, want %d", got[k], k, n)
		}
	}
}
