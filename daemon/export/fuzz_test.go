package export

import (
	"bytes"
	"io"
	"os"
	"testing"
)

// FuzzNDJSON reads arbitrary lines as records and writes what it accepts
// to CSV and Parquet: nothing may panic; a value of the wrong kind is an
// error of the Parquet writer, and the CSV writer takes anything.
func FuzzNDJSON(f *testing.F) {
	if data, err := os.ReadFile(ndjsonFile); err == nil {
		lines := bytes.SplitN(data, []byte("\n"), 3)
		f.Add(lines[0])
	}
	f.Add([]byte(`{"type":"alert","time":5,"t_s":"x","breath_seq":1.5,"evidence":{"a":1}}`))
	f.Add([]byte(`{"type":"breath","seq":-1,"flags":[1,null,{"a":[]}]}`))
	f.Fuzz(func(t *testing.T, b []byte) {
		var st ReadStats
		for rec, err := range ReadNDJSON(bytes.NewReader(b), &st) {
			if err != nil {
				return
			}
			if err := NewCSVWriter(io.Discard, rec.Kind).Write(rec); err != nil {
				t.Fatalf("CSV refused a record: %v", err)
			}
			p := NewParquetWriter(io.Discard, rec.Kind)
			_ = p.Write(rec)
			_ = p.Close()
		}
	})
}
