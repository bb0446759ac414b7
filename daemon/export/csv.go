package export

import (
	"encoding/csv"
	"fmt"
	"io"
)

// CSVWriter writes the records of one kind as CSV: one header row with the
// column names (units in the names, as in the JSON keys), then one row per
// record. Values are written as in the JSON: numbers with the same digits,
// null as an empty field.
type CSVWriter struct {
	w    *csv.Writer
	cols []Column
	row  []string
	head bool
}

// NewCSVWriter returns a CSV writer of records of kind k.
func NewCSVWriter(w io.Writer, k Kind) *CSVWriter {
	cols := Columns(k)
	return &CSVWriter{w: csv.NewWriter(w), cols: cols, row: make([]string, len(cols))}
}

// Write writes one record (the header first, once).
func (c *CSVWriter) Write(r Record) error {
	if !c.head {
		c.head = true
		for i, col := range c.cols {
			c.row[i] = col.Name
		}
		if err := c.w.Write(c.row); err != nil {
			return fmt.Errorf("write CSV: %w", err)
		}
	}
	for i, col := range c.cols {
		c.row[i] = text(r.Fields[col.Name])
	}
	if err := c.w.Write(c.row); err != nil {
		return fmt.Errorf("write CSV: %w", err)
	}
	return nil
}

// Close writes the header if no record came, and flushes.
func (c *CSVWriter) Close() error {
	if !c.head {
		c.head = true
		for i, col := range c.cols {
			c.row[i] = col.Name
		}
		_ = c.w.Write(c.row)
	}
	c.w.Flush()
	if err := c.w.Error(); err != nil {
		return fmt.Errorf("write CSV: %w", err)
	}
	return nil
}
