package cli

import (
	"bufio"
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"strconv"
	"strings"
	"text/tabwriter"
	"time"

	"github.com/spf13/cobra"

	"trapline/alerts"
	"trapline/alerts/pipeline"
	"trapline/analyze"
	"trapline/config"
	"trapline/daemon"
	"trapline/ingest"
	"trapline/ingest/input"
)

// analyzeFlags are the options of `trapline analyze`.
type analyzeFlags struct {
	in      inputFlags
	summary bool
	// Alert options: the configuration file whose analysis, detectors and
	// alarms sections apply, the wall time of stream time 0, and whether
	// alert events are printed at all.
	config   string
	start    string
	noAlerts bool
	// workers 1 decodes on one goroutine and analyses on another.
	workers int
}

// offlineEpoch is the default wall time of stream time 0 in offline
// analysis: the Unix epoch, so that an alert's time reads as its stream time
// and the output (alert ids included) depends on the recording alone.
var offlineEpoch = time.Unix(0, 0).UTC()

func (a *app) analyzeCommand() *cobra.Command {
	var f analyzeFlags
	cmd := &cobra.Command{
		Use:   "analyze FILE|DIR|-",
		Short: "Split a recording into breaths and print NDJSON breath records and alert events",
		Long: "analyze reads samples from FILE (or stdin for -) in the sample line format v1 or the\n" +
			"binary framing (found by itself, or --format), or a recording directory written by run\n" +
			"(--stream, --from and --to choose what is read). It shows a progress bar on a terminal.\n" +
			"It splits\n" +
			"them into breaths and prints one breath record per line as NDJSON: timing, volumes,\n" +
			"pressures, flows, the least-squares mechanics (R, C, total PEEP), the expiratory time\n" +
			"constant, trapped volume and intrinsic PEEP, with flags where a value is unreliable.\n" +
			"Units come from the header line; for input without one, --columns gives the layout.\n" +
			"--summary prints a table for people instead, with medians at the end.\n\n" +
			"The detectors and the alarm lifecycle run as in the daemon, and their alert events are\n" +
			"printed among the breath records in time order. Their wall time is --start plus the\n" +
			"stream time (default 1970-01-01T00:00:00Z, so it reads as the stream time); --config\n" +
			"applies the analysis, detectors and alarms sections of a configuration file.\n\n" +
			"  trapline analyze bench-a.csv | jq .trapped_ml\n" +
			"  trapline analyze --config other.yaml --stream bed-1 /var/lib/trapline/recording\n" +
			"  trapline sim --speed max --duration 60s | trapline analyze --summary -\n\n" +
			Caution,
		Args: inputArg,
		RunE: func(cmd *cobra.Command, args []string) error {
			f.in.streamSet = cmd.Flags().Changed("stream")
			return a.runAnalyze(cmd.Context(), args[0], f, cmd.OutOrStdout())
		},
	}
	fl := cmd.Flags()
	f.in.register(fl, true)
	fl.BoolVar(&f.summary, "summary", false, "print a table of breaths and their medians instead of NDJSON")
	fl.StringVar(&f.config, "config", "", "configuration file whose analysis, detectors and alarms sections apply")
	fl.StringVar(&f.start, "start", "", "wall time of stream time 0 for alert events (RFC 3339; default the Unix epoch)")
	fl.BoolVar(&f.noAlerts, "no-alerts", false, "print breath records only")
	fl.IntVar(&f.workers, "workers", 0, "1: decode on one goroutine and analyse on another (less wall time on a free core, a little more CPU); 0: one goroutine")
	return cmd
}

// offline analyses a recording: one pipeline (analyzer, detectors, alarm
// lifecycle) per stream, fed the samples in input order, in runs of one
// stream, so that breath records and alert events come out in the order
// they happen.
type offline struct {
	cfg       analyze.Config
	dcfg      analyze.DetectorConfig
	lcfg      alerts.LifecycleConfig
	start     time.Time
	alerts    bool
	pipelines ingest.StreamIndex[*pipeline.Pipeline]
	// pend holds a run of samples of pendStream not yet analysed: the
	// timing checks and the pipeline take a run in one call, and the
	// stream's pipeline is looked up once a run (runPl, the pipeline of
	// the run being analysed). Ordinary text lines come in runs already
	// (run); pend gathers the others (sample).
	pend       []ingest.Sample
	pendStream string
	runPl      *pipeline.Pipeline
	onGap      func(before []ingest.Sample, ev *ingest.Event)
	// timing applies the live sources' timing checks (ingest.Timelines),
	// so that re-analysis sees the samples the daemon saw.
	timing     *ingest.Timelines
	outOfOrder uint64 // samples the timing checks dropped
	nAlerts    int
	keptAlert  []alerts.Event // for --summary
	out        *bufio.Writer
	summary    bool
	kept       []analyze.Breath // for --summary
	line       []byte
	writeErr   error
	samples    uint64
	breaths    int
}

func newOffline(cfg analyze.Config, out io.Writer, summary bool) *offline {
	o := &offline{cfg: cfg, dcfg: analyze.DefaultDetectorConfig(), lcfg: alerts.DefaultLifecycleConfig(),
		start: offlineEpoch, alerts: true,
		pend: make([]ingest.Sample, 0, offlineRun),
		out:  bufio.NewWriterSize(out, 64<<10), summary: summary}
	o.onGap = o.gap
	return o
}

// sample takes one decoded sample into the pending run.
func (o *offline) sample(stream string, s ingest.Sample) {
	if len(o.pend) == offlineRun || stream != o.pendStream {
		o.flush()
		o.pendStream = stream
	}
	o.pend = append(o.pend, s)
}

// run takes a run of decoded samples of one stream: it goes to the
// pipeline as it is, after any pending samples.
func (o *offline) run(stream string, ss []ingest.Sample) {
	o.flush()
	o.analyse(stream, ss)
}

// offlineRun is the longest run of samples analysed at once.
const offlineRun = 256

// flush passes the pending run to analyse.
func (o *offline) flush() {
	if len(o.pend) > 0 {
		o.analyse(o.pendStream, o.pend)
		o.pend = o.pend[:0]
	}
}

// analyse passes a run of samples of stream, which it may change, through
// the timing checks to the stream's pipeline.
func (o *offline) analyse(stream string, ss []ingest.Sample) {
	o.samples += uint64(len(ss))
	pl, ok := o.pipelines.Get(stream)
	if !ok {
		pl = pipeline.NewOffline(pipeline.Options{Stream: stream, Analysis: o.cfg, Detectors: o.dcfg, Alarms: o.lcfg}, o.start)
		o.pipelines.Put(stream, pl)
	}
	o.runPl = pl
	if o.timing != nil {
		var dropped int
		ss, dropped = o.timing.AdmitRun(stream, ss, o.onGap)
		o.outOfOrder += uint64(dropped)
	}
	pl.Push(ss, o)
}

// gap hands on the samples before a gap, then the gap.
func (o *offline) gap(before []ingest.Sample, ev *ingest.Event) {
	o.runPl.Push(before, o)
	o.runPl.Status(*ev, time.Time{})
}

// Alert writes one alert event as a line of NDJSON.
func (o *offline) Alert(e *alerts.Event) {
	o.nAlerts++
	if !o.alerts || o.writeErr != nil {
		return
	}
	if o.summary {
		o.keptAlert = append(o.keptAlert, *e)
		return
	}
	b, err := e.Marshal()
	if err != nil {
		o.writeErr = err
		return
	}
	o.line = append(append(o.line[:0], b...), '\n')
	_, o.writeErr = o.out.Write(o.line)
}

// Breath handles one completed breath.
func (o *offline) Breath(b *analyze.Breath) {
	o.breaths++
	if o.summary {
		o.kept = append(o.kept, *b)
		return
	}
	if o.writeErr != nil {
		return
	}
	o.line = b.AppendJSON(o.line[:0])
	o.line = append(o.line, '\n')
	_, o.writeErr = o.out.Write(o.line)
}

// readAll reads the input at path ("-" for stdin: text, binary framing or
// a recording directory, see ingest/input) into o.
func (a *app) readAll(ctx context.Context, path string, f analyzeFlags, o *offline) (input.Stats, error) {
	in, err := openInput(path, f.in, a.stdin, a.stderr, "analyze")
	if err != nil {
		return input.Stats{}, err
	}
	o.timing = ingest.NewTimelines(f.in.sampleRate)
	defer in.Close()
	var st input.Stats
	if f.workers == 1 {
		st, err = in.RunPipelined(ctx, o.run)
	} else {
		st, err = in.RunBatched(ctx, o.sample, o.run)
	}
	o.flush()
	if err != nil {
		return st, noSamplesHint(err, st, in.Size(), f.in)
	}
	return st, nil
}

func (a *app) runAnalyze(ctx context.Context, path string, f analyzeFlags, stdout io.Writer) error {
	if err := f.in.check(); err != nil {
		return err
	}
	if f.workers != 0 && f.workers != 1 {
		return usageErrorf("--workers %d: want 0 (one goroutine) or 1 (decoding and analysis on two)", f.workers)
	}
	o := newOffline(analyze.DefaultConfig(), stdout, f.summary)
	if f.config != "" {
		c, err := config.Load(f.config, nil)
		if err != nil {
			return &daemon.UsageError{Err: err}
		}
		o.cfg, o.dcfg, o.lcfg = c.Analysis, c.Detectors, c.Alarms
	}
	if f.start != "" {
		t, err := time.Parse(time.RFC3339Nano, f.start)
		if err != nil {
			return usageErrorf("--start %q: want an RFC 3339 time such as 2026-12-01T10:00:00Z", f.start)
		}
		o.start = t.UTC()
	}
	o.alerts = o.alerts && !f.noAlerts
	st, err := a.readAll(ctx, path, f, o)
	if err != nil {
		if errors.Is(err, context.Canceled) {
			return nil
		}
		return err
	}
	if n := st.Decode.Samples; st.Kind == input.KindText && n > 0 && o.outOfOrder*2 > n {
		return fmt.Errorf("%d of %d samples are not in time order: the time column is probably another one%s",
			o.outOfOrder, n, columnsHint(st, f.in))
	}
	log := a.log.With().Str("component", "analyze").Logger()
	if d := st.Decode; d.BadLines > 0 || d.BadFrames > 0 {
		log.Warn().Uint64("bad_lines", d.BadLines).Uint64("bad_frames", d.BadFrames).Uint64("samples", d.Samples).
			Msg("skipped input that did not parse")
	}
	if sc := st.Scan; sc.BadSegments+sc.Truncated+sc.Corrupt > 0 {
		log.Warn().Int("bad_segments", sc.BadSegments).Int("truncated", sc.Truncated).Int("corrupt", sc.Corrupt).
			Uint64("skipped_bytes", sc.SkippedBytes).Msg("recording has damaged segments; read what was intact")
	}
	if f.summary {
		if err := writeSummary(o.out, o.kept); err != nil {
			return fmt.Errorf("write summary: %w", err)
		}
		if err := writeAlertSummary(o.out, o.keptAlert); err != nil {
			return fmt.Errorf("write summary: %w", err)
		}
	}
	if err := o.out.Flush(); err != nil && o.writeErr == nil {
		o.writeErr = err
	}
	if o.writeErr != nil {
		return fmt.Errorf("write breaths: %w", o.writeErr)
	}
	if o.breaths == 0 {
		log.Warn().Uint64("samples", st.Decode.Samples).Msg("no complete breath in the input (a breath completes when the next one starts)" +
			columnsHint(st, f.in))
	}
	return nil
}

// writeAlertSummary prints the alert events of --summary as a table, one
// state change per line, in the order they happened.
func writeAlertSummary(w io.Writer, evs []alerts.Event) error {
	if len(evs) == 0 {
		_, err := fmt.Fprintln(w, "\nNo alert events.")
		return err
	}
	fmt.Fprintf(w, "\n%s:\n", plural(len(evs), "alert event", "alert events"))
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', 0)
	fmt.Fprintln(tw, "t s\tstream\tcondition\tstate\tpriority\tmessage")
	for i := range evs {
		e := &evs[i]
		fmt.Fprintf(tw, "%.1f\t%s\t%s\t%s\t%s\t%s\n", e.TS, e.Stream, e.Condition, e.State, e.Priority, e.Message)
	}
	return tw.Flush()
}

// writeSummary prints the breaths as an aligned table and their medians.
func writeSummary(w io.Writer, bs []analyze.Breath) error {
	tw := tabwriter.NewWriter(w, 0, 0, 2, ' ', tabwriter.AlignRight)
	num := func(v float64, prec int) string {
		if math.IsNaN(v) || math.IsInf(v, 0) {
			return "-"
		}
		return strconv.FormatFloat(v, 'f', prec, 64)
	}
	fmt.Fprintln(tw, "stream\tseq\tt s\trate /min\tVTi mL\tVTe mL\tPpeak\tPplat\tPEEP\tR\tC mL/cmH2O\tτ s\tTe/τ\tEEF L/min\ttrapped mL\tPEEPi\tflags\t")
	row := func(stream, seq, t string, s analyze.Summary, flags string) {
		fmt.Fprintf(tw, "%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t%s\t\n", stream, seq, t,
			num(s.RateBPM, 1), num(s.VtiML, 0), num(s.VteML, 0), num(s.PeakCmH2O, 1), num(s.PlateauCmH2O, 1),
			num(s.PEEPCmH2O, 1), num(s.RCmH2OSPerL, 1), num(s.CMLPerCmH2O, 1), num(s.TauS, 2), num(s.TeOverTau, 2),
			num(s.EndExpFlowLPM, 1), num(s.TrappedML, 0), num(s.PEEPiCmH2O, 1), flags)
	}
	streams := []string{}
	byStream := map[string][]analyze.Breath{}
	for i := range bs {
		b := &bs[i]
		if _, ok := byStream[b.Stream]; !ok {
			streams = append(streams, b.Stream)
		}
		byStream[b.Stream] = append(byStream[b.Stream], *b)
		row(b.Stream, strconv.Itoa(b.Seq), num(b.StartS, 2), analyze.Summary{
			RateBPM: b.RateBPM, VtiML: b.VtiML, VteML: b.VteML, PeakCmH2O: b.PeakCmH2O, PlateauCmH2O: b.PlateauCmH2O,
			PEEPCmH2O: b.PEEPCmH2O, RCmH2OSPerL: b.RCmH2OSPerL, CMLPerCmH2O: b.CMLPerCmH2O, TauS: b.TauS,
			TeOverTau: b.TeOverTau, EndExpFlowLPM: b.EndExpFlowLPM, TrappedML: b.TrappedML, PEEPiCmH2O: b.PEEPiCmH2O,
		}, strings.Join(b.Flags, ","))
	}
	for _, st := range streams {
		s := analyze.Summarize(byStream[st])
		row(st, "median", "", s, plural(s.Breaths, "breath", "breaths")+fmt.Sprintf(", %d reliable", s.Reliable))
	}
	if err := tw.Flush(); err != nil {
		return err
	}
	_, err := fmt.Fprintln(w, "Pressures in cmH2O, R in cmH2O·s/L; mechanics medians over reliable breaths only.\n"+Caution)
	return err
}
