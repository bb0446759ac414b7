package cli

import (
	"bufio"
	"context"
	"fmt"
	"io"
	"os"
	"time"

	"github.com/nats-io/nats.go/jetstream"
	"github.com/spf13/cobra"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon/bus"
	"trapline/daemon/export"
)

// exportFlags are the options of `trapline export`.
type exportFlags struct {
	an       analyzeFlags // for a recording or sample input, analysed first
	out      string
	prefix   string
	formats  string
	fromNATS bool
	natsURL  string
	wait     time.Duration
}

func (a *app) exportCommand() *cobra.Command {
	var f exportFlags
	cmd := &cobra.Command{
		Use:   "export [FILE|DIR|-] [--from-nats]",
		Short: "Write breath records and alert events to CSV and Parquet files",
		Long: "export writes the breath records and the alert events of its input to one file per kind\n" +
			"and format in --out: <prefix>-breaths.csv, <prefix>-alerts.parquet and so on (docs/export.md).\n" +
			"The input is an NDJSON file of records (what analyze prints, or - for stdin), a recording\n" +
			"directory or a file of samples (analysed first, with --config's analysis, detectors and\n" +
			"alarms sections), or with --from-nats the JetStream streams of a running daemon\n" +
			"(--nats-url, or --config's nats section). --from and --to bound the wall time.\n\n" +
			"  trapline export --out results/ analysed.ndjson\n" +
			"  trapline export --out results/ --config other.yaml /var/lib/trapline/recording\n" +
			"  trapline export --out results/ --from-nats --from 2026-12-01T00:00:00Z\n\n" + Caution,
		Args: func(cmd *cobra.Command, args []string) error {
			switch {
			case f.fromNATS && len(args) == 0, !f.fromNATS && len(args) == 1:
				return nil
			case f.fromNATS:
				return usageErrorf("--from-nats reads JetStream: give no input file")
			}
			return inputArg(cmd, args)
		},
		RunE: func(cmd *cobra.Command, args []string) error {
			f.an.in.streamSet = cmd.Flags().Changed("stream")
			return a.runExport(cmd, args, f)
		},
	}
	fl := cmd.Flags()
	f.an.in.register(fl, true)
	fl.StringVar(&f.an.config, "config", "", "configuration file: the analysis sections for a recording, the nats section with --from-nats")
	fl.StringVar(&f.out, "out", ".", "directory of the files (created if missing)")
	fl.StringVar(&f.prefix, "prefix", "trapline", "start of the file names")
	fl.StringVar(&f.formats, "formats", "csv,parquet", "formats to write: csv, parquet or both")
	fl.BoolVar(&f.fromNATS, "from-nats", false, "read the daemon's JetStream streams instead of a file")
	fl.StringVar(&f.natsURL, "nats-url", defaultNATSURL, "with --from-nats: the NATS server of the daemon")
	fl.DurationVar(&f.wait, "wait", 5*time.Second, "with --from-nats: how long to wait for each message")
	return cmd
}

func (a *app) runExport(cmd *cobra.Command, args []string, f exportFlags) error {
	formats, err := export.ParseFormats(f.formats)
	if err != nil {
		return usageErrorf("--formats: %v", err)
	}
	inOpts, err := f.an.in.options(nil)
	if err != nil {
		return err
	}
	ctx := cmd.Context()
	opts := export.Options{Dir: f.out, Prefix: f.prefix, Formats: formats,
		Filter: export.Filter{From: inOpts.Filter.From, To: inOpts.Filter.To}}
	if f.an.in.streamSet {
		opts.Filter.Stream = f.an.in.stream
	}
	var recs export.Records
	var st export.ReadStats
	if f.fromNATS {
		js, closeNATS, err := a.exportJetStream(cmd, f)
		if err != nil {
			return err
		}
		defer closeNATS()
		recs = export.JetStream(ctx, js.js, export.JetStreamOptions{Streams: js.streams, Stream: opts.Filter.Stream,
			From: opts.Filter.From, To: opts.Filter.To, Wait: f.wait})
	} else {
		r, analysed, stop, err := a.exportInput(ctx, args[0], f)
		if err != nil {
			return err
		}
		defer stop()
		if analysed {
			// The time range chose the samples read; the records of an
			// offline analysis carry stream time, not receive time.
			opts.Filter.From, opts.Filter.To = time.Time{}, time.Time{}
		}
		recs = export.ReadNDJSON(r, &st)
	}
	res, err := export.ToFiles(ctx, recs, opts)
	if err != nil {
		return fmt.Errorf("export: %w", err)
	}
	if st.Skipped > 0 {
		a.log.Warn().Int("skipped", st.Skipped).AnErr("first", st.First).Msg("lines that were not records were skipped")
	}
	w := cmd.OutOrStdout()
	fmt.Fprintf(w, "exported %s and %s\n", plural(res.Rows[export.KindBreath], "breath record", "breath records"),
		plural(res.Rows[export.KindAlert], "alert event", "alert events"))
	for _, p := range res.Files {
		fmt.Fprintln(w, p)
	}
	return nil
}

// exportInput opens the input of export: NDJSON records as they are, or
// samples (a recording, text, binary) analysed on the fly into NDJSON
// through a pipe (analysed is true). stop waits for the analysis.
func (a *app) exportInput(ctx context.Context, path string, f exportFlags) (r io.Reader, analysed bool, stop func(), err error) {
	src := a.stdin
	if path != "-" {
		src = nil
		fi, err := os.Stat(path)
		if err != nil {
			return nil, false, nil, fmt.Errorf("open input: %w", err)
		}
		if !fi.IsDir() {
			file, err := os.Open(path)
			if err != nil {
				return nil, false, nil, fmt.Errorf("open input: %w", err)
			}
			src = file
		}
	}
	if src != nil {
		br := bufio.NewReaderSize(src, 64<<10)
		if isNDJSON(br) {
			return br, false, func() { closeIfFile(src) }, nil
		}
		closeIfFile(src)
		if path == "-" {
			// stdin has been peeked: analyse what was buffered and the rest.
			a.stdin = br
		}
	}
	pr, pw := io.Pipe()
	done := make(chan struct{})
	go func() {
		defer close(done)
		af := f.an
		af.summary, af.noAlerts = false, false
		pw.CloseWithError(a.runAnalyze(ctx, path, af, pw))
	}()
	return pr, true, func() { pr.Close(); <-done }, nil
}

// isNDJSON reports whether buffered input starts with a JSON object.
func isNDJSON(br *bufio.Reader) bool {
	for {
		b, err := br.Peek(1)
		if err != nil {
			return false
		}
		switch b[0] {
		case ' ', '\t', '\r', '\n':
			_, _ = br.ReadByte()
			continue
		}
		return b[0] == '{'
	}
}

func closeIfFile(r io.Reader) {
	if f, ok := r.(*os.File); ok && f != os.Stdin {
		_ = f.Close()
	}
}

// exportNATS is what export reads JetStream with.
type exportNATS struct {
	js      jetstream.JetStream
	streams alerts.StreamsConfig
}

// exportJetStream connects to the daemon's NATS server.
func (a *app) exportJetStream(cmd *cobra.Command, f exportFlags) (exportNATS, func(), error) {
	co, _, err := natsClient("trapline export", f.natsURL, f.an.config, cmd.Flags().Changed("nats-url"))
	if err != nil {
		return exportNATS{}, nil, err
	}
	streams := alerts.StreamsConfig{}
	if f.an.config != "" {
		cfg, err := config.Load(f.an.config, nil)
		if err != nil {
			return exportNATS{}, nil, err
		}
		streams = cfg.JetStream()
	}
	nc, err := bus.Connect(co, a.log)
	if err != nil {
		return exportNATS{}, nil, err
	}
	js, err := jetstream.New(nc)
	if err != nil {
		nc.Close()
		return exportNATS{}, nil, fmt.Errorf("jetstream: %w", err)
	}
	return exportNATS{js: js, streams: streams}, nc.Close, nil
}
