package export

import (
	"encoding/json"
	"fmt"
	"io"
	"strconv"
	"time"

	"github.com/parquet-go/parquet-go"
)

// ParquetWriter writes the records of one kind as a Parquet file: one
// optional column per JSON key (null where the record has null or lacks
// the key), doubles for measurements, int64 for counters, UTF-8 strings for
// text (lists joined with ";", objects as JSON text) and nanosecond UTC
// timestamps for wall times. Rows are buffered by the library and written
// in row groups; Close writes the footer.
type ParquetWriter struct {
	w     *parquet.GenericWriter[any]
	cols  []Column
	index []int // leaf index of each column in the schema
}

// NewParquetWriter returns a Parquet writer of records of kind k.
func NewParquetWriter(w io.Writer, k Kind) *ParquetWriter {
	cols := Columns(k)
	group := parquet.Group{}
	for _, c := range cols {
		group[c.Name] = parquet.Optional(parquetNode(c.Type))
	}
	schema := parquet.NewSchema("trapline_"+string(k), group)
	leaf := map[string]int{}
	for i, path := range schema.Columns() {
		leaf[path[0]] = i
	}
	p := &ParquetWriter{w: parquet.NewGenericWriter[any](w, schema), cols: cols, index: make([]int, len(cols))}
	for i, c := range cols {
		p.index[i] = leaf[c.Name]
	}
	return p
}

func parquetNode(t Type) parquet.Node {
	switch t {
	case Float:
		return parquet.Leaf(parquet.DoubleType)
	case Int:
		return parquet.Int(64)
	case Bool:
		return parquet.Leaf(parquet.BooleanType)
	case Time:
		return parquet.Timestamp(parquet.Nanosecond)
	}
	return parquet.String()
}

// Write adds one record.
func (p *ParquetWriter) Write(r Record) error {
	row := make(parquet.Row, len(p.cols))
	for i, c := range p.cols {
		v, err := parquetValue(c, r.Fields[c.Name])
		if err != nil {
			return fmt.Errorf("write Parquet: %s: %w", c.Name, err)
		}
		def := 1
		if v.IsNull() {
			def = 0
		}
		row[p.index[i]] = v.Level(0, def, p.index[i])
	}
	if _, err := p.w.WriteRows([]parquet.Row{row}); err != nil {
		return fmt.Errorf("write Parquet: %w", err)
	}
	return nil
}

// parquetValue converts a JSON value to the column's Parquet value.
func parquetValue(c Column, v any) (parquet.Value, error) {
	if v == nil {
		return parquet.NullValue(), nil
	}
	switch c.Type {
	case Float:
		n, ok := v.(json.Number)
		if !ok {
			return parquet.Value{}, fmt.Errorf("want a number, got %v", v)
		}
		f, err := strconv.ParseFloat(string(n), 64)
		return parquet.DoubleValue(f), err
	case Int:
		n, ok := v.(json.Number)
		if !ok {
			return parquet.Value{}, fmt.Errorf("want an integer, got %v", v)
		}
		i, err := strconv.ParseInt(string(n), 10, 64)
		return parquet.Int64Value(i), err
	case Bool:
		b, ok := v.(bool)
		if !ok {
			return parquet.Value{}, fmt.Errorf("want true or false, got %v", v)
		}
		return parquet.BooleanValue(b), nil
	case Time:
		s, _ := v.(string)
		t, err := time.Parse(time.RFC3339Nano, s)
		if err != nil {
			return parquet.Value{}, fmt.Errorf("want an RFC 3339 time, got %v", v)
		}
		return parquet.Int64Value(t.UnixNano()), nil
	}
	return parquet.ByteArrayValue([]byte(text(v))), nil
}

// Close writes the footer; the underlying writer is not closed.
func (p *ParquetWriter) Close() error {
	if err := p.w.Close(); err != nil {
		return fmt.Errorf("write Parquet: %w", err)
	}
	return nil
}
