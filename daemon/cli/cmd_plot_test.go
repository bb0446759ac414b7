package cli

import (
	"bufio"
	"bytes"
	"encoding/json"
	"encoding/xml"
	"errors"
	"image/png"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"trapline/alerts"
	"trapline/alerts/alarmbook"
	"trapline/analyze"
)

// analyzeRecords runs `trapline analyze` on path and returns its breath
// records and alert events: what the figure must show.
func analyzeRecords(t *testing.T, path string) ([]analyze.Breath, []alerts.Event) {
	t.Helper()
	var stdout, stderr bytes.Buffer
	if code := Run(t.Context(), []string{"analyze", path}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("analyze: exit %d: %s", code, stderr.String())
	}
	var bs []analyze.Breath
	var evs []alerts.Event
	sc := bufio.NewScanner(&stdout)
	sc.Buffer(nil, 1<<20)
	for sc.Scan() {
		var head struct {
			Type string `json:"type"`
		}
		if err := json.Unmarshal(sc.Bytes(), &head); err != nil {
			t.Fatalf("analyze output %q: %v", sc.Text(), err)
		}
		if head.Type == "alert" {
			var ev alerts.Event
			if err := json.Unmarshal(sc.Bytes(), &ev); err != nil {
				t.Fatal(err)
			}
			evs = append(evs, ev)
			continue
		}
		var b analyze.Breath
		if err := json.Unmarshal(sc.Bytes(), &b); err != nil {
			t.Fatal(err)
		}
		bs = append(bs, b)
	}
	return bs, evs
}

// svgClasses counts the elements of each class in a well-formed SVG.
func svgClasses(t *testing.T, svg []byte) map[string]int {
	t.Helper()
	counts := map[string]int{}
	dec := xml.NewDecoder(bytes.NewReader(svg))
	for {
		tok, err := dec.Token()
		if errors.Is(err, io.EOF) {
			return counts
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
}

// The plot verb draws what `trapline analyze` finds in the same recording:
// the three waveforms, one breath-start mark per breath in each waveform
// panel, one end-expiratory flow point per breath, and one band per alarm
// (events grouped into alarms by alerts/alarmbook, independently of the
// figure). A PNG of a range decodes. Bad flags are usage errors.
func TestPlotVerbDrawsEveryBreathAndAlarm(t *testing.T) {
	path := writeScenario(t, "bronchospasm")
	breaths, events := analyzeRecords(t, path)
	svgPath := filepath.Join(t.TempDir(), "fig.svg")
	const fromS, toS = 290.0, 620.0
	var stdout, stderr bytes.Buffer
	args := []string{"plot", path, "--out", svgPath, "--from", "290", "--to", "620"}
	if code := Run(t.Context(), args, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("plot: exit %d: %s", code, stderr.String())
	}
	svg, err := os.ReadFile(svgPath)
	if err != nil {
		t.Fatal(err)
	}
	got := svgClasses(t, svg)
	var starts, eef int
	for _, b := range breaths {
		if b.StartS >= fromS && b.StartS <= toS {
			starts++
		}
		if b.EndS >= fromS && b.EndS <= toS && b.EndExpFlowLPM == b.EndExpFlowLPM {
			eef++
		}
	}
	book := alarmbook.New()
	for i := range events {
		book.Apply(&events[i])
	}
	alarms := 0
	for _, a := range book.Alarms() {
		if lo, hi := a.Span(toS); hi >= fromS && lo <= toS {
			alarms++
		}
	}
	if starts < 50 || alarms == 0 {
		t.Fatalf("%d breaths and %d alarms in %g–%g s: the test needs an air-trapping stretch", starts, alarms, fromS, toS)
	}
	want := map[string]int{"breath-start pressure": starts, "breath-start flow": starts, "breath-start volume": starts, "eef": eef, "alarm": alarms}
	for k, n := range want {
		if got[k] != n {
			t.Errorf("%d elements of class %q, want %d", got[k], k, n)
		}
	}
	for _, series := range []string{"pressure", "flow", "volume", "peepi-line", "trapped-line"} {
		if got[series] == 0 {
			t.Errorf("no %s series", series)
		}
	}
	t.Logf("%g–%g s: %d breaths, %d alarms, %d bytes of SVG", fromS, toS, starts, alarms, len(svg))

	pngPath := filepath.Join(t.TempDir(), "fig.img")
	if code := Run(t.Context(), []string{"plot", path, "-o", pngPath, "--format", "png", "--from", "300", "--to", "330"}, nil, &stdout, &stderr); code != ExitOK {
		t.Fatalf("plot png: exit %d: %s", code, stderr.String())
	}
	f, err := os.Open(pngPath)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	if _, err := png.Decode(f); err != nil {
		t.Errorf("PNG does not decode: %v", err)
	}

	for _, bad := range [][]string{
		{"plot", path},
		{"plot", path, "--out", "x.gif"},
		{"plot", path, "--out", svgPath, "--from", "50", "--to", "40"},
		{"plot", path, "--out", svgPath, "--stream", "nosuch"},
	} {
		stderr.Reset()
		if code := Run(t.Context(), bad, nil, &stdout, &stderr); code != ExitUsage {
			t.Errorf("%v: exit %d, want %d (usage): %s", bad, code, ExitUsage, stderr.String())
		}
		if !strings.HasPrefix(stderr.String(), "trapline: ") {
			t.Errorf("%v: stderr %q", bad, stderr.String())
		}
	}
}
