package cli

import (
	"bytes"
	"encoding/csv"
	"encoding/json"
	"errors"
	"io"
	"math"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"

	"github.com/parquet-go/parquet-go"
)

// run runs the command line and fails the test unless it exits with want.
func run(t *testing.T, want int, stdin []byte, args ...string) string {
	t.Helper()
	var out, errb bytes.Buffer
	if code := Run(t.Context(), append(args, "--log-level", "error"), bytes.NewReader(stdin), &out, &errb); code != want {
		t.Fatalf("%v: exit %d, want %d; stderr %s", args, code, want, errb.String())
	}
	return out.String()
}

// simFile writes a shipped scenario sampled at 50 Hz to a file.
func simFile(t *testing.T, dir, name string, extra ...string) string {
	t.Helper()
	path := filepath.Join(dir, name)
	run(t, ExitOK, nil, append([]string{"sim", "--scenario", "hyperinflation", "--speed", "max", "--duration", "90s",
		"--seed", "3", "--sample-rate", "50", "--out", path}, extra...)...)
	return path
}

// records splits NDJSON into breath records and alert events, each as a
// map of its fields.
func records(t *testing.T, ndjson string) (breaths, alertEvs []map[string]any) {
	t.Helper()
	for _, line := range strings.Split(strings.TrimSpace(ndjson), "\n") {
		var m map[string]any
		if err := json.Unmarshal([]byte(line), &m); err != nil {
			t.Fatalf("line %q: %v", line, err)
		}
		if m["type"] == "breath" {
			breaths = append(breaths, m)
		} else {
			alertEvs = append(alertEvs, m)
		}
	}
	return breaths, alertEvs
}

// TestExportVerbReadsBack exports a recording through the verb (analysed
// first) and reads the CSV with encoding/csv and the Parquet file with the
// Parquet library's own reader: the same rows and values as analyze's
// NDJSON of the same recording.
func TestExportVerbReadsBack(t *testing.T) {
	dir := t.TempDir()
	rec := simFile(t, dir, "p.csv")
	breaths, evs := records(t, run(t, ExitOK, nil, "analyze", rec))
	if len(breaths) < 10 || len(evs) == 0 {
		t.Fatalf("%d breaths, %d alert events: want a few of each", len(breaths), len(evs))
	}
	out := filepath.Join(dir, "out")
	msg := run(t, ExitOK, nil, "export", "--out", out, rec)
	if !strings.Contains(msg, strconv.Itoa(len(breaths))+" breath records") {
		t.Errorf("export says %q", msg)
	}
	f, err := os.Open(filepath.Join(out, "trapline-breaths.csv"))
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	if len(rows) != len(breaths)+1 {
		t.Fatalf("%d CSV rows, want a header and %d", len(rows), len(breaths))
	}
	for i, b := range breaths {
		for j, name := range rows[0] {
			v, ok := b[name]
			if !ok || name == "flags" {
				continue
			}
			cell := rows[i+1][j]
			switch x := v.(type) {
			case float64:
				got, err := strconv.ParseFloat(cell, 64)
				if err != nil || got != x {
					t.Fatalf("breath %d %s: CSV %q, NDJSON %v", i, name, cell, x)
				}
			case string:
				if cell != x {
					t.Fatalf("breath %d %s: CSV %q, NDJSON %q", i, name, cell, x)
				}
			case nil:
				if cell != "" {
					t.Fatalf("breath %d %s: CSV %q, NDJSON null", i, name, cell)
				}
			}
		}
	}
	// Parquet: the trapped volume column, read by the library's reader.
	pf, err := os.Open(filepath.Join(out, "trapline-breaths.parquet"))
	if err != nil {
		t.Fatal(err)
	}
	defer pf.Close()
	r := parquet.NewReader(pf)
	defer r.Close()
	leaf, ok := r.Schema().Lookup("trapped_ml")
	if !ok {
		t.Fatal("no trapped_ml column in the Parquet file")
	}
	var got []float64
	buf := make([]parquet.Row, 32)
	for {
		n, err := r.ReadRows(buf)
		for _, row := range buf[:n] {
			for _, v := range row {
				if v.Column() == leaf.ColumnIndex {
					if v.IsNull() {
						got = append(got, math.NaN())
					} else {
						got = append(got, v.Double())
					}
				}
			}
		}
		if errors.Is(err, io.EOF) {
			break
		}
		if err != nil {
			t.Fatal(err)
		}
	}
	if len(got) != len(breaths) {
		t.Fatalf("%d Parquet rows, want %d", len(got), len(breaths))
	}
	for i, b := range breaths {
		want, isNum := b["trapped_ml"].(float64)
		if (isNum && got[i] != want) || (!isNum && !math.IsNaN(got[i])) {
			t.Fatalf("breath %d trapped_ml: Parquet %v, NDJSON %v", i, got[i], b["trapped_ml"])
		}
	}
}

// TestProvenanceOneThreshold analyses one recording twice, the second
// time with one detector threshold changed: the breath records differ
// only in config_digest, and both runs carry the same program version.
func TestProvenanceOneThreshold(t *testing.T) {
	dir := t.TempDir()
	rec := simFile(t, dir, "p.csv")
	cfg := filepath.Join(dir, "other.yaml")
	if err := os.WriteFile(cfg, []byte("detectors:\n  air_trapping:\n    trapped_ml: 400\n"), 0o600); err != nil {
		t.Fatal(err)
	}
	b1, a1 := records(t, run(t, ExitOK, nil, "analyze", rec))
	b2, a2 := records(t, run(t, ExitOK, nil, "analyze", "--config", cfg, rec))
	if len(b1) != len(b2) || len(b1) == 0 {
		t.Fatalf("%d and %d breaths", len(b1), len(b2))
	}
	d1, d2 := b1[0]["config_digest"], b2[0]["config_digest"]
	if d1 == d2 || b1[0]["trapline_version"] != b2[0]["trapline_version"] {
		t.Fatalf("digests %v and %v, versions %v and %v", d1, d2, b1[0]["trapline_version"], b2[0]["trapline_version"])
	}
	for i := range b1 {
		if b1[i]["config_digest"] != d1 || b2[i]["config_digest"] != d2 {
			t.Fatalf("breath %d: digest changed within a run", i)
		}
		delete(b1[i], "config_digest")
		delete(b2[i], "config_digest")
		x, _ := json.Marshal(b1[i])
		y, _ := json.Marshal(b2[i])
		if !bytes.Equal(x, y) {
			t.Fatalf("breath %d differs beyond the digest:\n%s\n%s", i, x, y)
		}
	}
	for _, e := range append(a1, a2...) {
		if e["config_digest"] != d1 && e["config_digest"] != d2 {
			t.Fatalf("alert event with digest %v", e["config_digest"])
		}
	}
	t.Logf("digests %v → %v; alert events %d → %d (the threshold's effect)", d1, d2, len(a1), len(a2))
}

// TestBinaryRecordingEqualsText analyses one patient written once as text
// and once in the binary framing.
func TestBinaryRecordingEqualsText(t *testing.T) {
	dir := t.TempDir()
	text := simFile(t, dir, "p.csv", "--decimals", "0")
	bin := simFile(t, dir, "p.bin", "--format", "binary")
	bt, at := records(t, run(t, ExitOK, nil, "analyze", "--stream", "icu-04", text))
	bb, ab := records(t, run(t, ExitOK, nil, "analyze", bin))
	if len(bt) != len(bb) || len(at) != len(ab) {
		t.Fatalf("text: %d breaths, %d alert events; binary: %d, %d", len(bt), len(at), len(bb), len(ab))
	}
	for i := range bt {
		for k, v := range bt[i] {
			w := bb[i][k]
			if x, ok := v.(float64); ok {
				y, _ := w.(float64)
				if math.Abs(x-y) > tolerance(k, x) {
					t.Errorf("breath %d %s: text %v, binary %v", i, k, x, y)
				}
				continue
			}
			if !equalJSON(v, w) {
				t.Errorf("breath %d %s: text %v, binary %v", i, k, v, w)
			}
		}
	}
	for i := range at {
		for _, k := range []string{"condition", "state", "priority", "breath_seq", "t_s"} {
			if !equalJSON(at[i][k], ab[i][k]) {
				t.Errorf("alert %d %s: text %v, binary %v", i, k, at[i][k], ab[i][k])
			}
		}
	}
}

// tolerance is what the binary framing's quantisation may move a value.
// The framing stores pressure in steps of 0.001 cmH2O and flow in steps of
// 0.01 mL/s (docs/framing.md), while the text here carries every float
// exactly; a derived value that lies near a rounding boundary of its record
// precision (0.01 for pressures, 0.1 mL for volumes) can then print one
// last digit apart. Allowed: one such step, or 0.1 % of the value.
func tolerance(_ string, x float64) float64 { return max(1e-3*math.Abs(x), 0.011) }

func equalJSON(a, b any) bool {
	x, _ := json.Marshal(a)
	y, _ := json.Marshal(b)
	return bytes.Equal(x, y)
}

// TestSimWardAndStreamColumn writes three patients on one output and reads
// them back as three streams; a single patient with --stream carries its
// stream id in a column of the text.
func TestSimWardAndStreamColumn(t *testing.T) {
	ward := run(t, ExitOK, nil, "sim", "--patients", "3", "--ward", "stable,bronchospasm", "--speed", "max",
		"--duration", "30s", "--sample-rate", "50")
	breaths, _ := records(t, run(t, ExitOK, []byte(ward), "analyze", "-"))
	per := map[any]int{}
	for _, b := range breaths {
		per[b["stream"]]++
	}
	if len(per) != 3 || per["bed-1"] == 0 || per["bed-2"] == 0 || per["bed-3"] == 0 {
		t.Errorf("breaths per stream %v, want bed-1, bed-2 and bed-3", per)
	}
	one := run(t, ExitOK, nil, "sim", "--stream", "icu-9", "--speed", "max", "--duration", "10s")
	head, _, _ := strings.Cut(one, "\n")
	if !strings.HasPrefix(head, "stream,") || !strings.Contains(one, "\nicu-9,") {
		t.Errorf("sim --stream: header %q and no icu-9 lines", head)
	}
	run(t, ExitUsage, nil, "sim", "--patients", "2", "--stream", "x")
}
