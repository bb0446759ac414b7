package cli

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"path/filepath"
	"strings"

	"github.com/spf13/cobra"

	"trapline/analyze"
	"trapline/config"
	"trapline/daemon"
	"trapline/daemon/plot"
	"trapline/ingest"
	"trapline/ingest/input"
)

// plotFlags are the options of `trapline plot`.
type plotFlags struct {
	out        string
	format     string
	stream     string
	fromS, toS float64
	columns    string
	sampleRate float64
	config     string
	title      string
}

func (a *app) plotCommand() *cobra.Command {
	var f plotFlags
	cmd := &cobra.Command{
		Use:   "plot FILE|DIR|- --out FIGURE.svg|FIGURE.png",
		Short: "Draw a recording as a figure: waveforms, breath marks, air-trapping trends and alarms",
		Long: "plot reads a recording — a file in the sample line format or the binary framing, a\n" +
			"recording directory, or stdin for - — analyses it offline exactly as `trapline analyze`\n" +
			"does, and draws one stream as SVG or PNG: pressure, flow and volume against time with\n" +
			"every breath's start and end-expiratory flow marked, intrinsic PEEP and trapped volume\n" +
			"per breath beneath, and the alarms as bands coloured by priority (docs/pictures.md).\n" +
			"The format follows the extension of --out unless --format names it.\n\n" +
			"  trapline plot bench-a.csv --out bench-a.svg\n" +
			"  trapline plot data/recording --stream bed-3 --from 600 --to 900 --out bed-3.png\n\n" +
			Caution,
		Args: cobra.ExactArgs(1),
		RunE: func(cmd *cobra.Command, args []string) error {
			return a.runPlot(cmd.Context(), args[0], f)
		},
	}
	fl := cmd.Flags()
	fl.StringVarP(&f.out, "out", "o", "", "figure file to write (.svg or .png)")
	fl.StringVar(&f.format, "format", "", "svg or png (default: from the extension of --out)")
	fl.StringVar(&f.stream, "stream", "", "stream to draw (default: the first stream of the input)")
	fl.Float64Var(&f.fromS, "from", 0, "start of the time range, seconds of stream time")
	fl.Float64Var(&f.toS, "to", 0, "end of the time range, seconds of stream time (0: to the end)")
	fl.StringVar(&f.columns, "columns", ingest.DefaultColumns, "column layout of text input without a header line")
	fl.Float64Var(&f.sampleRate, "sample-rate", 0, "sample rate in Hz, for input without a time column")
	fl.StringVar(&f.config, "config", "", "configuration file whose analysis, detectors and alarms sections apply")
	fl.StringVar(&f.title, "title", "", "title of the figure (default: the stream and the range)")
	return cmd
}

// plotFormat checks the flags and returns the figure's format.
func plotFormat(f plotFlags) (string, error) {
	if f.out == "" {
		return "", usageErrorf("--out: name the figure file to write (.svg or .png)")
	}
	format := strings.ToLower(f.format)
	if format == "" {
		format = strings.TrimPrefix(strings.ToLower(filepath.Ext(f.out)), ".")
	}
	if format != "svg" && format != "png" {
		return "", usageErrorf("--out %s: want a .svg or .png file, or --format svg|png", f.out)
	}
	if bad := math.IsNaN(f.fromS) || math.IsNaN(f.toS) || f.fromS < 0 || f.toS < 0 || (f.toS != 0 && f.toS <= f.fromS); bad {
		return "", usageErrorf("--from %g --to %g: want 0 ≤ from < to seconds (to 0: the end)", f.fromS, f.toS)
	}
	if f.stream != "" && !ingest.ValidStreamID(f.stream) {
		return "", usageErrorf("--stream %q: want letters, digits, '-' or '_'", f.stream)
	}
	return format, nil
}

func (a *app) runPlot(ctx context.Context, path string, f plotFlags) error {
	format, err := plotFormat(f)
	if err != nil {
		return err
	}
	o := newOffline(analyze.DefaultConfig(), io.Discard, true)
	if f.config != "" {
		c, err := config.Load(f.config, nil)
		if err != nil {
			return &daemon.UsageError{Err: err}
		}
		o.cfg, o.dcfg, o.lcfg = c.Analysis, c.Detectors, c.Alarms
	}
	in, err := input.Open(path, input.Options{
		Decoder: ingest.DecoderOptions{Columns: f.columns, RateHz: f.sampleRate, Stream: ingest.DefaultStream},
		Stdin:   a.stdin,
	})
	if err != nil {
		return err
	}
	defer in.Close()
	// The analysis sees every stream (as analyze does); the figure keeps
	// the samples of the chosen one.
	stream := f.stream
	var samples []ingest.Sample
	if _, err := in.Run(ctx, func(id string, s ingest.Sample) {
		if stream == "" {
			stream = id
		}
		if id == stream {
			samples = append(samples, s)
		}
		o.sample(id, s)
	}); err != nil {
		if errors.Is(err, context.Canceled) {
			return nil
		}
		return err
	}
	if len(samples) == 0 {
		return usageErrorf("--stream %q: no samples of that stream in %s", stream, path)
	}
	data := plot.Select(stream, samples, o.kept, o.keptAlert)
	return writeFigure(f.out, format, data, plot.Options{FromS: f.fromS, ToS: f.toS, Title: f.title})
}

// writeFigure draws data into the file out, which it replaces only once
// the figure is complete.
func writeFigure(out, format string, data plot.Data, opts plot.Options) error {
	tmp, err := os.CreateTemp(filepath.Dir(out), "."+filepath.Base(out)+"-*")
	if err != nil {
		return fmt.Errorf("write figure: %w", err)
	}
	defer os.Remove(tmp.Name())
	w := bufio.NewWriter(tmp)
	if err := plot.Recording(w, format, data, opts); err != nil {
		tmp.Close()
		if errors.Is(err, plot.ErrNoData) {
			return usageErrorf("--from %g --to %g: %w", opts.FromS, opts.ToS, err)
		}
		return fmt.Errorf("plot %s: %w", out, err)
	}
	if err := w.Flush(); err != nil {
		tmp.Close()
		return fmt.Errorf("write %s: %w", out, err)
	}
	// CreateTemp makes the file private; a figure is for sharing.
	if err := tmp.Chmod(0o644); err != nil {
		tmp.Close()
		return fmt.Errorf("write %s: %w", out, err)
	}
	if err := tmp.Close(); err != nil {
		return fmt.Errorf("write %s: %w", out, err)
	}
	if err := os.Rename(tmp.Name(), out); err != nil {
		return fmt.Errorf("write %s: %w", out, err)
	}
	return nil
}
