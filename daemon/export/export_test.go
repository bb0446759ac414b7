package export

import (
	"bytes"
	"context"
	"encoding/csv"
	"encoding/json"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/parquet-go/parquet-go"
)

// The test input is the output of
//
//	trapline sim --scenario hyperinflation --speed max | trapline analyze -
//
// cut to its first 60 lines and every alert event: breath records with
// null values and flags, alert events with evidence, predictions and a
// null breath_seq or not.
const ndjsonFile = "testdata/hyperinflation.ndjson"

// expected reads the NDJSON with encoding/json on its own: the values every
// export must reproduce.
func expected(t *testing.T) map[Kind][]map[string]any {
	t.Helper()
	data, err := os.ReadFile(ndjsonFile)
	if err != nil {
		t.Fatal(err)
	}
	out := map[Kind][]map[string]any{}
	for _, line := range bytes.Split(bytes.TrimSpace(data), []byte("\n")) {
		var m map[string]any
		if err := json.Unmarshal(line, &m); err != nil {
			t.Fatal(err)
		}
		k := Kind(m["type"].(string))
		out[k] = append(out[k], m)
	}
	if len(out[KindBreath]) < 50 || len(out[KindAlert]) < 3 {
		t.Fatalf("test input has %d breaths and %d alerts", len(out[KindBreath]), len(out[KindAlert]))
	}
	return out
}

// equalValue compares a value read back from an export with the JSON
// value: numbers by float64 value, lists as ";"-joined text, objects as
// JSON text, null as absent.
func equalValue(t *testing.T, where string, got any, want any) {
	t.Helper()
	switch w := want.(type) {
	case nil:
		if got != nil && got != "" {
			t.Errorf("%s: got %v, want null", where, got)
		}
	case float64:
		var g float64
		switch x := got.(type) {
		case string:
			g, _ = strconv.ParseFloat(x, 64)
		case float64:
			g = x
		case int64:
			g = float64(x)
		}
		if g != w {
			t.Errorf("%s: got %v, want %v", where, got, w)
		}
	case string:
		if tm, ok := got.(time.Time); ok {
			wt, _ := time.Parse(time.RFC3339Nano, w)
			if !tm.Equal(wt) {
				t.Errorf("%s: got %v, want %v", where, tm, wt)
			}
		} else if got != w {
			t.Errorf("%s: got %v, want %q", where, got, w)
		}
	case []any:
		parts := make([]string, len(w))
		for i, x := range w {
			parts[i] = x.(string)
		}
		if got != strings.Join(parts, ";") {
			t.Errorf("%s: got %v, want %v", where, got, w)
		}
	case map[string]any:
		var g map[string]any
		if err := json.Unmarshal([]byte(got.(string)), &g); err != nil || len(g) != len(w) {
			t.Errorf("%s: got %v, want %v", where, got, w)
			return
		}
		for k, v := range w {
			if g[k] != v {
				t.Errorf("%s.%s: got %v, want %v", where, k, g[k], v)
			}
		}
	default:
		t.Errorf("%s: unexpected JSON value %v", where, want)
	}
}

// readCSV reads a CSV export with encoding/csv into maps.
func readCSV(t *testing.T, path string) []map[string]any {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	rows, err := csv.NewReader(f).ReadAll()
	if err != nil {
		t.Fatal(err)
	}
	var out []map[string]any
	for _, r := range rows[1:] {
		m := map[string]any{}
		for i, name := range rows[0] {
			m[name] = r[i]
		}
		out = append(out, m)
	}
	return out
}

// readParquet reads a Parquet export with the library's generic reader,
// typing values by the file's own schema.
func readParquet(t *testing.T, path string) []map[string]any {
	t.Helper()
	f, err := os.Open(path)
	if err != nil {
		t.Fatal(err)
	}
	defer f.Close()
	r := parquet.NewReader(f)
	defer r.Close()
	cols := r.Schema().Columns()
	var out []map[string]any
	buf := make([]parquet.Row, 16)
	for {
		n, err := r.ReadRows(buf)
		for _, row := range buf[:n] {
			m := map[string]any{}
			for _, v := range row {
				name := cols[v.Column()][0]
				leaf, _ := r.Schema().Lookup(name)
				lt := leaf.Node.Type().LogicalType()
				switch {
				case v.IsNull():
					m[name] = nil
				case lt != nil && strings.HasPrefix(lt.String(), "TIMESTAMP"):
					m[name] = time.Unix(0, v.Int64()).UTC()
				case v.Kind() == parquet.Double:
					m[name] = v.Double()
				case v.Kind() == parquet.Int64:
					m[name] = v.Int64()
				case v.Kind() == parquet.Boolean:
					m[name] = v.Boolean()
				default:
					m[name] = string(v.ByteArray())
				}
			}
			out = append(out, m)
		}
		if errors.Is(err, io.EOF) {
			return out
		}
		if err != nil {
			t.Fatal(err)
		}
	}
}

// TestExportReadsBack exports the NDJSON to CSV and Parquet and reads both
// back with independent readers: the same rows, in order, with the same
// values as the NDJSON, and every JSON key a column.
func TestExportReadsBack(t *testing.T) {
	want := expected(t)
	in, err := os.Open(ndjsonFile)
	if err != nil {
		t.Fatal(err)
	}
	defer in.Close()
	dir := t.TempDir()
	var st ReadStats
	res, err := ToFiles(context.Background(), ReadNDJSON(in, &st), Options{Dir: dir})
	if err != nil {
		t.Fatal(err)
	}
	if len(res.Files) != 4 || st.Skipped != 0 {
		t.Fatalf("files %v, %d lines skipped", res.Files, st.Skipped)
	}
	for _, k := range Kinds {
		for _, f := range []Format{CSV, Parquet} {
			path := filepath.Join(dir, fileName("trapline", k, f))
			var got []map[string]any
			if f == CSV {
				got = readCSV(t, path)
			} else {
				got = readParquet(t, path)
			}
			if len(got) != len(want[k]) || res.Rows[k] != len(want[k]) {
				t.Fatalf("%s: %d rows, want %d", path, len(got), len(want[k]))
			}
			for i, w := range want[k] {
				for key, wv := range w {
					gv, ok := got[i][key]
					if !ok && wv != nil {
						t.Fatalf("%s: no column %s", path, key)
					}
					equalValue(t, filepath.Base(path)+" row "+strconv.Itoa(i)+" "+key, gv, wv)
				}
			}
		}
	}
	if entries, _ := os.ReadDir(dir); len(entries) != 4 {
		t.Errorf("%d entries in the export directory, want the 4 files and no leftovers", len(entries))
	}
}

// TestFilterAndBadLines keeps one stream and a time range, and skips and
// counts lines that are not records.
func TestFilterAndBadLines(t *testing.T) {
	input := `{"type":"breath","schema":1,"stream":"a","seq":0,"t_start_s":1.5,"pip_cmh2o":20}
not json
{"type":"alert","schema":1,"id":"b/x/1000","stream":"b","time":"2026-03-01T10:00:01Z","t_s":1}
{"type":"breath","schema":1,"stream":"a","seq":1,"t_start_s":9.5,"pip_cmh2o":21}

{"type":"summary"}
{"type":"alert","schema":1,"id":"a/x/5000","stream":"a","time":"2026-03-01T10:00:05Z","t_s":5}
{"type":"alert","schema":1,"id":"a/x/9000","stream":"a","time":"2026-03-01T10:00:09Z","t_s":9}
`
	from, to := 0.0, 6.0
	tests := []struct {
		name          string
		f             Filter
		breath, alert int
	}{
		{"all", Filter{}, 2, 3},
		{"stream", Filter{Stream: "a"}, 2, 2},
		{"stream time", Filter{Stream: "a", FromS: &from, ToS: &to}, 1, 1},
		{"wall time", Filter{From: time.Date(2026, 3, 1, 10, 0, 2, 0, time.UTC), To: time.Date(2026, 3, 1, 10, 0, 9, 0, time.UTC)}, 2, 1},
	}
	for _, tc := range tests {
		t.Run(tc.name, func(t *testing.T) {
			var st ReadStats
			res, err := ToFiles(context.Background(), ReadNDJSON(strings.NewReader(input), &st), Options{Dir: t.TempDir(), Formats: []Format{CSV}, Filter: tc.f})
			if err != nil {
				t.Fatal(err)
			}
			if res.Rows[KindBreath] != tc.breath || res.Rows[KindAlert] != tc.alert {
				t.Errorf("rows %v, want %d breaths and %d alerts", res.Rows, tc.breath, tc.alert)
			}
			if st.Lines != 7 || st.Skipped != 2 || st.First == nil || !strings.Contains(st.First.Error(), "line 2") {
				t.Errorf("read stats %+v: want 7 lines, 2 skipped, the first at line 2", st)
			}
		})
	}
}

func TestParseFormats(t *testing.T) {
	if f, err := ParseFormats("csv, parquet"); err != nil || len(f) != 2 {
		t.Errorf("%v %v", f, err)
	}
	if _, err := ParseFormats("xlsx"); err == nil {
		t.Error("xlsx accepted")
	}
}
