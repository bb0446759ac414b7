package export

import (
	"context"
	"fmt"
	"os"
	"path/filepath"
	"strings"
)

// Format is an export file format.
type Format string

// The export formats.
const (
	CSV     Format = "csv"
	Parquet Format = "parquet"
)

// ParseFormats reads a comma-separated list of formats ("csv,parquet").
func ParseFormats(s string) ([]Format, error) {
	var out []Format
	for _, f := range strings.Split(s, ",") {
		switch Format(strings.TrimSpace(f)) {
		case CSV:
			out = append(out, CSV)
		case Parquet:
			out = append(out, Parquet)
		default:
			return nil, fmt.Errorf("format %q: want csv or parquet", f)
		}
	}
	return out, nil
}

// RecordWriter writes records of one kind to one file.
type RecordWriter interface {
	Write(Record) error
	Close() error
}

// Options configure ToFiles.
type Options struct {
	// Dir is where the files go (created if missing).
	Dir string
	// Prefix starts every file name: <prefix>-breaths.csv and so on.
	// Default "trapline".
	Prefix string
	// Formats are the formats to write; default CSV and Parquet.
	Formats []Format
	// Filter chooses the records.
	Filter Filter
}

// Result says what ToFiles wrote.
type Result struct {
	// Files are the paths written, one per kind and format.
	Files []string
	// Rows counts the records written per kind.
	Rows map[Kind]int
	// Filtered counts the records the filter left out.
	Filtered int
}

// fileName returns the name of the file of one kind and format.
func fileName(prefix string, k Kind, f Format) string {
	return fmt.Sprintf("%s-%ss.%s", prefix, k, f)
}

// output is one file being written: a temporary name until it is complete.
type output struct {
	f    *os.File
	w    RecordWriter
	path string
}

// ToFiles writes the records to one file per kind and format. Files are
// written under a temporary name and renamed when complete, so a failed or
// cancelled export leaves no partial file. Every kind gets its files, with
// a header only when it has no records.
func ToFiles(ctx context.Context, recs Records, opts Options) (res Result, err error) {
	if opts.Prefix == "" {
		opts.Prefix = "trapline"
	}
	if len(opts.Formats) == 0 {
		opts.Formats = []Format{CSV, Parquet}
	}
	if err := os.MkdirAll(opts.Dir, 0o755); err != nil {
		return res, fmt.Errorf("create export directory: %w", err)
	}
	outs := map[Kind][]*output{}
	var all []*output
	defer func() {
		for _, o := range all {
			if o.f != nil {
				_ = o.f.Close()
				_ = os.Remove(o.f.Name())
			}
		}
	}()
	for _, k := range Kinds {
		for _, f := range opts.Formats {
			o, err := newOutput(opts.Dir, fileName(opts.Prefix, k, f), k, f)
			if err != nil {
				return res, err
			}
			outs[k] = append(outs[k], o)
			all = append(all, o)
		}
	}
	res.Rows = map[Kind]int{}
	for rec, err := range recs {
		if err != nil {
			return res, err
		}
		if err := ctx.Err(); err != nil {
			return res, err
		}
		if !opts.Filter.Match(rec) {
			res.Filtered++
			continue
		}
		for _, o := range outs[rec.Kind] {
			if err := o.w.Write(rec); err != nil {
				return res, fmt.Errorf("%s: %w", o.path, err)
			}
		}
		res.Rows[rec.Kind]++
	}
	for _, o := range all {
		if err := o.finish(); err != nil {
			return res, err
		}
		res.Files = append(res.Files, o.path)
	}
	return res, nil
}

func newOutput(dir, name string, k Kind, f Format) (*output, error) {
	file, err := os.CreateTemp(dir, "."+name+".*")
	if err != nil {
		return nil, fmt.Errorf("create export file: %w", err)
	}
	o := &output{f: file, path: filepath.Join(dir, name)}
	if f == CSV {
		o.w = NewCSVWriter(file, k)
	} else {
		o.w = NewParquetWriter(file, k)
	}
	return o, nil
}

// finish completes the file and gives it its name.
func (o *output) finish() error {
	err := o.w.Close()
	if err == nil {
		err = o.f.Sync()
	}
	if cerr := o.f.Close(); err == nil {
		err = cerr
	}
	if err == nil {
		err = os.Rename(o.f.Name(), o.path)
	}
	if err != nil {
		_ = os.Remove(o.f.Name())
		o.f = nil
		return fmt.Errorf("write %s: %w", o.path, err)
	}
	o.f = nil
	return nil
}
