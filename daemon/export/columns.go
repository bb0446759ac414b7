package export

import (
	"bytes"
	"encoding/json"
	"reflect"
	"strings"
	"time"

	"trapline/alerts"
	"trapline/analyze"
)

// Type is the type of a column.
type Type int

// The column types.
const (
	String Type = iota // text; lists are joined with ";", objects are JSON text
	Float              // float64; null is empty
	Int                // int64; null is empty
	Bool
	Time // wall time, RFC 3339 in CSV, a nanosecond timestamp in Parquet
)

// Column is one column of an export file: a JSON key of the records.
type Column struct {
	Name string
	Type Type
}

// ProvenanceColumns are written for every kind: the program version and the
// configuration digest that produced the record (empty in records that do
// not carry them yet).
var ProvenanceColumns = []Column{{"trapline_version", String}, {"config_digest", String}}

// Columns returns the columns of a kind, in the order of the record's JSON,
// followed by the provenance columns when the record has none of its own.
func Columns(k Kind) []Column {
	var cols []Column
	switch k {
	case KindBreath:
		cols = breathColumns()
	case KindAlert:
		cols = structColumns(reflect.TypeFor[alerts.Event]())
	}
	for _, p := range ProvenanceColumns {
		if !hasColumn(cols, p.Name) {
			cols = append(cols, p)
		}
	}
	return cols
}

func hasColumn(cols []Column, name string) bool {
	for _, c := range cols {
		if c.Name == name {
			return true
		}
	}
	return false
}

// intKeys are the integer fields of a breath record.
var intKeys = map[string]bool{"schema": true, "seq": true}

// breathColumns reads the keys of a breath record from its own encoder, so
// that they stay in step with the contract.
func breathColumns() []Column {
	b := analyze.NewBreath()
	// String fields that may be null in a record are set, so that their
	// column is typed as text.
	b.Mode = analyze.ModeVolume
	dec := json.NewDecoder(bytes.NewReader(b.AppendJSON(nil)))
	dec.UseNumber()
	_, _ = dec.Token() // {
	var cols []Column
	for dec.More() {
		tok, _ := dec.Token()
		name, _ := tok.(string)
		var v any
		_ = dec.Decode(&v)
		t := Float
		switch v.(type) {
		case string, []any:
			t = String
		case bool:
			t = Bool
		}
		if intKeys[name] {
			t = Int
		}
		cols = append(cols, Column{Name: name, Type: t})
	}
	return cols
}

// structColumns derives columns from the JSON tags of a record type.
func structColumns(t reflect.Type) []Column {
	var cols []Column
	for i := 0; i < t.NumField(); i++ {
		f := t.Field(i)
		name, _, _ := strings.Cut(f.Tag.Get("json"), ",")
		if name == "-" || !f.IsExported() {
			continue
		}
		if name == "" {
			name = f.Name
		}
		ft := f.Type
		for ft.Kind() == reflect.Pointer {
			ft = ft.Elem()
		}
		c := Column{Name: name, Type: String}
		switch {
		case ft == reflect.TypeFor[time.Time]():
			c.Type = Time
		case ft.Kind() == reflect.Float64 || ft.Kind() == reflect.Float32:
			c.Type = Float
		case ft.Kind() >= reflect.Int && ft.Kind() <= reflect.Uint64:
			c.Type = Int
		case ft.Kind() == reflect.Bool:
			c.Type = Bool
		}
		cols = append(cols, c)
	}
	return cols
}

// text returns the CSV text of a JSON value: numbers as they were written,
// null as empty, lists of strings joined with ";", objects as JSON.
func text(v any) string {
	switch v := v.(type) {
	case nil:
		return ""
	case string:
		return v
	case json.Number:
		return string(v)
	case bool:
		if v {
			return "true"
		}
		return "false"
	case []any:
		parts := make([]string, len(v))
		for i, x := range v {
			parts[i] = text(x)
		}
		return strings.Join(parts, ";")
	}
	b, _ := json.Marshal(v)
	return string(b)
}
