package cli

import (
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"time"

	"github.com/spf13/cobra"
	"github.com/spf13/pflag"

	"trapline/daemon"
	"trapline/ingest"
	"trapline/ingest/input"
	"trapline/ingest/record"
)

// inputFlags choose and shape the input of the verbs that re-read signals
// (analyze, predict --from, export): a file, stdin or a recording.
type inputFlags struct {
	format     string
	columns    string
	sampleRate float64
	stream     string
	streamSet  bool // --stream was given: a recording reads only that stream
	from, to   string
	noProgress bool
}

// register adds the input flags to fl; timeRange adds --from and --to.
func (f *inputFlags) register(fl *pflag.FlagSet, timeRange bool) {
	fl.StringVar(&f.format, "format", "auto", "input format: auto, text, binary or recording (a directory)")
	fl.StringVar(&f.columns, "columns", ingest.DefaultColumns, "column layout of text input without a header line")
	fl.Float64Var(&f.sampleRate, "sample-rate", 0, "sample rate in Hz, for input without a time column")
	fl.StringVar(&f.stream, "stream", ingest.DefaultStream,
		"stream id of samples that name none; for a recording, the one stream to read (default all)")
	if timeRange {
		fl.StringVar(&f.from, "from", "", "recording: read from this receive time (RFC 3339)")
		fl.StringVar(&f.to, "to", "", "recording: read up to this receive time (RFC 3339, exclusive)")
	}
}

// check validates the flags that need no input.
func (f *inputFlags) check() error {
	if f.sampleRate < 0 || math.IsNaN(f.sampleRate) || math.IsInf(f.sampleRate, 0) {
		return usageErrorf("--sample-rate %v: want a positive number of Hz", f.sampleRate)
	}
	if _, err := ingest.NewTextDecoder(ingest.DecoderOptions{Columns: f.columns, RateHz: f.sampleRate, Stream: f.stream},
		func(string, ingest.Sample) {}); err != nil {
		return usageErrorf("--columns: %v", err)
	}
	_, err := f.options(nil)
	return err
}

// options builds the input options.
func (f *inputFlags) options(stdin io.Reader) (input.Options, error) {
	kind, err := input.ParseKind(f.format)
	if err != nil {
		return input.Options{}, usageErrorf("--format: %v", err)
	}
	o := input.Options{
		Kind:    kind,
		Decoder: ingest.DecoderOptions{Columns: f.columns, RateHz: f.sampleRate, Stream: f.stream},
		Stdin:   stdin,
	}
	if f.streamSet {
		o.Filter.Stream = f.stream
	}
	for _, t := range []struct {
		name, v string
		dst     *time.Time
	}{{"--from", f.from, &o.Filter.From}, {"--to", f.to, &o.Filter.To}} {
		if t.v == "" {
			continue
		}
		v, err := time.Parse(time.RFC3339Nano, t.v)
		if err != nil {
			return o, usageErrorf("%s %q: want an RFC 3339 time such as 2026-12-01T10:00:00Z", t.name, t.v)
		}
		*t.dst = v
	}
	if !o.Filter.From.IsZero() && !o.Filter.To.IsZero() && !o.Filter.From.Before(o.Filter.To) {
		return o, usageErrorf("--from %s is not before --to %s", f.from, f.to)
	}
	return o, nil
}

// openInput opens path with the flags; a progress bar goes to stderr when
// it is a terminal.
func openInput(path string, f inputFlags, stdin io.Reader, stderr io.Writer, what string) (*input.Input, error) {
	o, err := f.options(stdin)
	if err != nil {
		return nil, err
	}
	if file, ok := stderr.(*os.File); ok && !f.noProgress {
		o.Progress = input.ProgressBar(file, what)
	}
	if path != "-" {
		if fi, err := os.Stat(path); err == nil && fi.IsDir() && !record.IsRecording(path) {
			return nil, usageErrorf("%s is a directory but not a recording (no %s and no *%s files)",
				path, record.IndexName, record.SegmentExt)
		}
	}
	in, err := input.Open(path, o)
	if err != nil {
		return nil, err
	}
	return in, nil
}

// errNoInputArg is the answer to a verb given no input.
var errNoInputArg = errors.New("give a recording file, a recording directory or - for stdin")

// inputArg accepts exactly one input argument and says what to pass
// otherwise.
func inputArg(_ *cobra.Command, args []string) error {
	switch len(args) {
	case 1:
		return nil
	case 0:
		return &daemon.UsageError{Err: errNoInputArg}
	}
	return usageErrorf("%d inputs given: %v", len(args), errNoInputArg)
}

// noSamplesHint adds to an input error that yielded no sample what the
// reader assumed and how to change it.
func noSamplesHint(err error, st input.Stats, size int64, f inputFlags) error {
	if st.Decode.Samples > 0 || st.Kind != input.KindText {
		return err
	}
	if size == 0 {
		return fmt.Errorf("%w; the input is empty", err)
	}
	if st.Decode.BadLines == 0 {
		return fmt.Errorf("%w; the input has no samples after its header (or holds only comments)", err)
	}
	return fmt.Errorf("%w; every line was bad with the columns assumed %q: put a header line first, "+
		"or give the layout with --columns", err, f.columns)
}

// columnsHint explains input that gave samples but no breath: often a
// file without a header whose columns are in another order.
func columnsHint(st input.Stats, f inputFlags) string {
	if st.Kind != input.KindText {
		return ""
	}
	return fmt.Sprintf("; if the input has no header line its columns were assumed to be %q: "+
		"if they are in another order, give them with --columns", f.columns)
}

// plural writes n with the singular or plural noun.
func plural(n int, one, many string) string {
	if n == 1 {
		return "1 " + one
	}
	return strconv.Itoa(n) + " " + many
}
