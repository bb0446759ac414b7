package export

import (
	"bufio"
	"bytes"
	"encoding/json"
	"fmt"
	"io"
	"iter"
	"strconv"
	"time"
)

// Kind is the type of a record: its "type" field.
type Kind string

// The record kinds.
const (
	KindBreath Kind = "breath"
	KindAlert  Kind = "alert"
)

// Kinds lists the record kinds in the order files are written.
var Kinds = []Kind{KindBreath, KindAlert}

// Record is one breath record or alert event as decoded JSON: numbers are
// json.Number (their exact text), null is nil.
type Record struct {
	Kind   Kind
	Fields map[string]any
}

// Records is a source of records; an error ends it.
type Records = iter.Seq2[Record, error]

// ParseRecord decodes one JSON object; its "type" must be breath or alert.
func ParseRecord(line []byte) (Record, error) {
	dec := json.NewDecoder(bytes.NewReader(line))
	dec.UseNumber()
	var m map[string]any
	if err := dec.Decode(&m); err != nil {
		return Record{}, fmt.Errorf("not a JSON object: %w", err)
	}
	if dec.More() {
		return Record{}, fmt.Errorf("more than one JSON value on the line")
	}
	switch k := Kind(fmt.Sprint(m["type"])); k {
	case KindBreath, KindAlert:
		return Record{Kind: k, Fields: m}, nil
	default:
		return Record{}, fmt.Errorf("type %v: want breath or alert", m["type"])
	}
}

// ReadStats counts what ReadNDJSON skipped.
type ReadStats struct {
	Lines   int   // non-blank lines read
	Skipped int   // lines that were not a breath record or an alert event
	First   error // why the first skipped line was skipped
}

// ReadNDJSON yields the records of NDJSON input, one per line. Blank lines
// are ignored; a line that is not a breath record or alert event is skipped
// and counted in st (nothing else is lost); a read error ends the sequence.
func ReadNDJSON(r io.Reader, st *ReadStats) Records {
	return func(yield func(Record, error) bool) {
		sc := bufio.NewScanner(r)
		sc.Buffer(make([]byte, 64<<10), 16<<20)
		n := 0
		for sc.Scan() {
			n++
			line := bytes.TrimSpace(sc.Bytes())
			if len(line) == 0 {
				continue
			}
			st.Lines++
			rec, err := ParseRecord(line)
			if err != nil {
				st.Skipped++
				if st.First == nil {
					st.First = fmt.Errorf("line %d: %w", n, err)
				}
				continue
			}
			if !yield(rec, nil) {
				return
			}
		}
		if err := sc.Err(); err != nil {
			yield(Record{}, fmt.Errorf("read NDJSON: %w", err))
		}
	}
}

// Filter chooses records. Zero values choose everything.
type Filter struct {
	// Stream keeps one stream's records; empty keeps all.
	Stream string
	// From and To bound the wall time ("time" field; From inclusive, To
	// exclusive). A record without a wall time (breath records of schema
	// 1) passes them.
	From, To time.Time
	// FromS and ToS bound the stream time (t_start_s of a breath, t_s of an
	// alert event), when not nil.
	FromS, ToS *float64
}

// Match reports whether a record passes the filter.
func (f Filter) Match(r Record) bool {
	if f.Stream != "" && r.Fields["stream"] != f.Stream {
		return false
	}
	if s, ok := r.Fields["time"].(string); ok && (!f.From.IsZero() || !f.To.IsZero()) {
		t, err := time.Parse(time.RFC3339Nano, s)
		if err != nil || (!f.From.IsZero() && t.Before(f.From)) || (!f.To.IsZero() && !t.Before(f.To)) {
			return false
		}
	}
	if f.FromS == nil && f.ToS == nil {
		return true
	}
	key := "t_s"
	if r.Kind == KindBreath {
		key = "t_start_s"
	}
	n, ok := r.Fields[key].(json.Number)
	if !ok {
		return false
	}
	ts, err := strconv.ParseFloat(string(n), 64)
	return err == nil && (f.FromS == nil || ts >= *f.FromS) && (f.ToS == nil || ts < *f.ToS)
}
