package cli

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"path/filepath"
	"time"

	"github.com/rs/zerolog"
	"github.com/spf13/cobra"

	"trapline/config"
	"trapline/daemon"
	"trapline/daemon/bus"
	"trapline/daemon/tui"
	"trapline/daemon/web"
	"trapline/ingest"
	"trapline/simulator"
)

// demoOptions are the flags of `trapline demo`.
type demoOptions struct {
	Scenario string
	Speed    float64
	Stream   string
	Plain    bool
	JSON     bool
	// Settle is how long the demo waits after the last sample for the last
	// breath and alerts to come through.
	Settle time.Duration
}

func (a *app) demoCommand() *cobra.Command {
	opts := demoOptions{Scenario: "bronchospasm", Speed: 10, Settle: 3 * time.Second}
	cmd := &cobra.Command{
		Use:   "demo",
		Short: "Run a simulated patient through the whole daemon and show it live (about two minutes)",
		Long: "demo starts an embedded NATS server in a temporary directory, streams a simulated patient over a\n" +
			"virtual serial port (a pseudo-terminal) at --speed times real time, runs the daemon on that\n" +
			"port and shows the breaths and alerts live, in the terminal and in the browser (the live view's\n" +
			"address is printed at the start). It ends by itself with a summary of the alarms: raised,\n" +
			"escalated, acknowledged, cleared and still open. The default scenario, bronchospasm, builds up air trapping that settings\n" +
			"changes then resolve.\n\n" + Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if opts.Speed < 0.1 || opts.Speed > 1000 {
				return usageErrorf("--speed %g: want 0.1 to 1000", opts.Speed)
			}
			if opts.Stream != "" && !ingest.ValidStreamID(opts.Stream) {
				return usageErrorf("--stream %q: want letters, digits, '-' or '_'", opts.Stream)
			}
			log := a.log
			if !cmd.Flags().Changed("log-level") {
				// The view is the demo's output; only problems go to the log.
				// (The serial port appears only once the simulator runs, and
				// vanishes when it ends: expected warnings, not shown.)
				log = log.Level(zerolog.ErrorLevel)
			}
			return runDemo(cmd.Context(), opts, cmd.OutOrStdout(), cmd.ErrOrStderr(), log)
		},
	}
	f := cmd.Flags()
	f.StringVar(&opts.Scenario, "scenario", opts.Scenario, fmt.Sprintf("shipped scenario (%v) or a scenario YAML file", simulator.ShippedNames()))
	f.Float64Var(&opts.Speed, "speed", opts.Speed, "how many times faster than real time the patient is simulated")
	f.StringVar(&opts.Stream, "stream", opts.Stream, "stream id of the simulated patient (default: the scenario's)")
	f.BoolVar(&opts.Plain, "plain", false, "plain line output even on a terminal")
	f.BoolVar(&opts.JSON, "json", false, "print breath records and alert events as NDJSON instead of the view (caution and summary on stderr)")
	return cmd
}

// runDemo runs the demo until the scenario has played or ctx is cancelled,
// and prints the summary. The view goes to out; so do the caution and the
// summary, except with --json, where they go to errOut so that out stays
// pure NDJSON.
func runDemo(ctx context.Context, opts demoOptions, out, errOut io.Writer, log zerolog.Logger) error {
	view := out
	if opts.JSON {
		out = errOut
	}
	sc, sim, err := demoScenario(&opts)
	if err != nil {
		return err
	}
	fmt.Fprintln(out, Caution)
	fmt.Fprintln(out)
	say(out, "demo: scenario %q (%s), %.0f s of signal at %g× speed: about %.0f s.",
		sc.Name, sc.Description, sim.DurationS(), opts.Speed, sim.DurationS()/opts.Speed)
	dir, err := os.MkdirTemp("", "trapline-demo-")
	if err != nil {
		return fmt.Errorf("demo data directory: %w", err)
	}
	defer os.RemoveAll(dir)
	// The virtual serial port: the simulator writes a pseudo-terminal and
	// keeps a link to it; the daemon opens the link like a USB serial
	// adapter (and reopens it if the simulator's link drops).
	link := filepath.Join(dir, "ventilator")
	port, err := simulator.ParseOutput("pty", simulator.OutputOptions{Link: link})
	if err != nil {
		return fmt.Errorf("virtual serial port: %w", err)
	}
	say(out, "demo: virtual serial port %s, embedded NATS in %s", link, dir)
	dd, err := startDemoDaemon(ctx, demoConfig(dir, link, opts.Stream), log)
	if err != nil {
		return err
	}
	defer dd.stop()
	if dd.info.HTTPAddr != "" {
		say(out, "demo: live view in your browser at http://%s%s", dd.info.HTTPAddr, web.Path)
	}
	fmt.Fprintln(out)
	v, stopView, err := startDemoView(ctx, dd, opts, view, log)
	if err != nil {
		return err
	}
	start := time.Now()
	perr := dd.play(ctx, sim, port, opts)
	stopView()
	runErr := dd.shutdown()
	fmt.Fprintf(out, "\ndemo: finished after %.0f s. Alarms:\n", time.Since(start).Seconds())
	for _, l := range v.summary(0) {
		fmt.Fprintln(out, l)
	}
	fmt.Fprintln(out, "\n"+Caution)
	if perr != nil && !errors.Is(perr, context.Canceled) {
		return perr
	}
	return runErr
}

// say prints a line of the demo's own, wrapped to 80 columns (a path or
// an address is not broken).
func say(out io.Writer, format string, args ...any) {
	for _, l := range tui.Wrap(fmt.Sprintf(format, args...), tui.DefaultWidth, 6, 0) {
		fmt.Fprintln(out, l)
	}
}

// demoScenario loads the scenario and makes its simulator; opts.Stream
// becomes the stream id in use.
func demoScenario(opts *demoOptions) (simulator.Scenario, *simulator.Sim, error) {
	sc, err := simulator.LoadScenario(opts.Scenario)
	if err != nil {
		return sc, nil, &daemon.UsageError{Err: fmt.Errorf("--scenario: %w", err)}
	}
	if opts.Stream != "" {
		sc.Stream = opts.Stream
	}
	if sc.Stream == "" {
		sc.Stream = "sim"
	}
	opts.Stream = sc.Stream
	sim, err := simulator.New(sc)
	if err != nil {
		return sc, nil, &daemon.UsageError{Err: fmt.Errorf("--scenario %s: %w", opts.Scenario, err)}
	}
	return sc, sim, nil
}

// demoConfig is the demo daemon's configuration: data in dir, NATS
// embedded on a free port, HTTP (the live view and /metrics) on a free
// loopback port, one stream read from the virtual serial port at link.
func demoConfig(dir, link, stream string) *config.Config {
	cfg := config.Default()
	cfg.DataDir = dir
	cfg.HTTP.Listen = "127.0.0.1:0"
	cfg.NATS.Embedded.Port = 0
	cfg.ShutdownTimeout = 5 * time.Second
	cfg.Streams = []config.Stream{{ID: stream, Source: "serial://" + link + "?baud=115200"}}
	return cfg
}

// demoDaemon is the daemon the demo runs in-process.
type demoDaemon struct {
	d    *daemon.Daemon
	cfg  *config.Config
	info daemon.Info
	stop context.CancelFunc
	done chan struct{}
	err  error // Run's result, once done is closed
}

// startDemoDaemon starts the daemon and waits until it runs and its
// JetStream streams exist (the view replays alerts from them).
func startDemoDaemon(ctx context.Context, cfg *config.Config, log zerolog.Logger) (*demoDaemon, error) {
	if err := cfg.Validate(); err != nil {
		return nil, fmt.Errorf("demo configuration: %w", err)
	}
	readyc := make(chan daemon.Info, 1)
	d, err := daemon.New(cfg, log, daemon.Options{Ready: func(i daemon.Info) { readyc <- i }})
	if err != nil {
		return nil, err
	}
	dctx, stop := context.WithCancel(context.WithoutCancel(ctx))
	dd := &demoDaemon{d: d, cfg: cfg, stop: stop, done: make(chan struct{})}
	go func() { defer close(dd.done); dd.err = d.Run(dctx) }()
	select {
	case dd.info = <-readyc:
	case <-dd.done:
		stop()
		return nil, fmt.Errorf("demo daemon: %w", dd.err)
	case <-time.After(30 * time.Second):
		stop()
		return nil, errors.New("demo daemon did not start within 30 s")
	}
	waitUntil(10*time.Second, func() bool { return d.AlertStreamsReady() == nil })
	return dd, nil
}

// startDemoView connects the view to the demo's NATS and runs it; the
// returned function stops it (after the last alerts have come through).
func startDemoView(ctx context.Context, dd *demoDaemon, opts demoOptions, out io.Writer, log zerolog.Logger) (*watchView, func(), error) {
	vo := dd.info.Client
	vo.Name = "trapline demo view"
	nc, err := bus.Connect(vo, log)
	if err != nil {
		return nil, nil, fmt.Errorf("connect to the demo's NATS at %s: %w", dd.info.NATSURL, err)
	}
	v := newWatchView(out, watchOptions{Prefix: dd.cfg.NATS.SubjectPrefix, JSON: opts.JSON, Plain: opts.Plain, PlainEvery: 5 * time.Second, Footer: Caution})
	stops, err := v.subscribe(ctx, nc, log.Warn)
	if err != nil {
		nc.Close()
		return nil, nil, err
	}
	vctx, stopLoop := context.WithCancel(context.WithoutCancel(ctx))
	viewDone := make(chan struct{})
	go func() { defer close(viewDone); v.loop(vctx) }()
	return v, func() {
		// Every alert raised so far has reached JetStream once the spool
		// is empty; a moment later the view has it too.
		waitUntil(5*time.Second, func() bool { return dd.d.SpoolDepth() == 0 })
		time.Sleep(300 * time.Millisecond)
		for _, s := range stops {
			s()
		}
		stopLoop()
		<-viewDone
		nc.Close()
	}, nil
}

// play streams the scenario into the serial port, then lets the last
// breaths and alerts through for opts.Settle. Ctrl-C (or the daemon
// failing) ends it early; the summary still shows.
func (dd *demoDaemon) play(ctx context.Context, sim *simulator.Sim, port simulator.Output, opts demoOptions) error {
	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 3})
	if err != nil {
		return fmt.Errorf("demo encoder: %w", err)
	}
	pctx, stopPlay := context.WithCancel(ctx)
	defer stopPlay()
	go func() {
		select {
		case <-dd.done:
			stopPlay()
		case <-pctx.Done():
		}
	}()
	_, perr := simulator.Stream(pctx, sim, port, simulator.StreamOptions{Encoder: enc, Speed: opts.Speed})
	if perr == nil {
		settle := time.NewTimer(opts.Settle)
		defer settle.Stop()
		select {
		case <-settle.C:
		case <-ctx.Done():
		}
	}
	return perr
}

// shutdown stops the daemon and returns how its run ended.
func (dd *demoDaemon) shutdown() error {
	dd.stop()
	select {
	case <-dd.done:
		return dd.err
	case <-time.After(dd.cfg.ShutdownTimeout + 10*time.Second):
		return errors.New("demo daemon did not stop in time")
	}
}

// waitUntil polls cond every 20 ms until it holds or d has passed.
func waitUntil(d time.Duration, cond func() bool) {
	deadline := time.Now().Add(d)
	for !cond() && time.Now().Before(deadline) {
		time.Sleep(20 * time.Millisecond)
	}
}
