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
			"port and shows the breaths and alerts live. It ends by itself with a summary of the alerts\n" +
			"raised and cleared. The default scenario, bronchospasm, builds up air trapping that settings\n" +
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
	sc, err := simulator.LoadScenario(opts.Scenario)
	if err != nil {
		return &daemon.UsageError{Err: fmt.Errorf("--scenario: %w", err)}
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
		return &daemon.UsageError{Err: fmt.Errorf("--scenario %s: %w", opts.Scenario, err)}
	}
	fmt.Fprintln(out, Caution)
	fmt.Fprintf(out, "\ndemo: scenario %q (%s), %.0f s of signal at %g× speed: about %.0f s.\n",
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
	fmt.Fprintf(out, "demo: virtual serial port %s, embedded NATS in %s\n\n", link, dir)

	cfg := config.Default()
	cfg.DataDir = dir
	cfg.HTTP.Listen = ""
	cfg.NATS.Embedded.Port = 0
	cfg.ShutdownTimeout = 5 * time.Second
	cfg.Streams = []config.Stream{{ID: opts.Stream, Source: "serial://" + link + "?baud=115200"}}
	if err := cfg.Validate(); err != nil {
		return fmt.Errorf("demo configuration: %w", err)
	}

	enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: 3})
	if err != nil {
		return fmt.Errorf("demo encoder: %w", err)
	}
	readyc := make(chan daemon.Info, 1)
	d, err := daemon.New(cfg, log, daemon.Options{Ready: func(i daemon.Info) { readyc <- i }})
	if err != nil {
		return err
	}
	dctx, stopDaemon := context.WithCancel(context.WithoutCancel(ctx))
	defer stopDaemon()
	var daemonErr error
	daemonDone := make(chan struct{})
	go func() { defer close(daemonDone); daemonErr = d.Run(dctx) }()
	var info daemon.Info
	select {
	case info = <-readyc:
	case <-daemonDone:
		return fmt.Errorf("demo daemon: %w", daemonErr)
	case <-time.After(30 * time.Second):
		return errors.New("demo daemon did not start within 30 s")
	}

	// The view replays alerts from JetStream: wait for the streams.
	waitUntil(10*time.Second, func() bool { return d.AlertStreamsReady() == nil })

	vo := info.Client
	vo.Name = "trapline demo view"
	nc, err := bus.Connect(vo, log)
	if err != nil {
		return fmt.Errorf("connect to the demo's NATS at %s: %w", info.NATSURL, err)
	}
	defer nc.Close()
	v := newWatchView(view, watchOptions{Prefix: cfg.NATS.SubjectPrefix, JSON: opts.JSON, Plain: opts.Plain, PlainEvery: 5 * time.Second, Footer: Caution})
	stops, err := v.subscribe(ctx, nc, log.Warn)
	if err != nil {
		return err
	}
	vctx, stopView := context.WithCancel(context.WithoutCancel(ctx))
	defer stopView()
	viewDone := make(chan struct{})
	go func() { defer close(viewDone); v.loop(vctx) }()

	// Play the scenario; Ctrl-C (or the daemon failing) ends it early and
	// the summary still shows.
	start := time.Now()
	pctx, stopPlay := context.WithCancel(ctx)
	defer stopPlay()
	go func() {
		select {
		case <-daemonDone:
			stopPlay()
		case <-pctx.Done():
		}
	}()
	_, perr := simulator.Stream(pctx, sim, port, simulator.StreamOptions{Encoder: enc, Speed: opts.Speed})
	if perr == nil {
		settle := time.NewTimer(opts.Settle)
		select {
		case <-settle.C:
		case <-ctx.Done():
			settle.Stop()
		}
	}
	// Every alert raised so far has reached JetStream once the spool is
	// empty; a moment later the view has it too. Then the view stops, and
	// the daemon.
	waitUntil(5*time.Second, func() bool { return d.SpoolDepth() == 0 })
	time.Sleep(300 * time.Millisecond)
	for _, s := range stops {
		s()
	}
	stopView()
	<-viewDone
	stopDaemon()
	var runErr error
	select {
	case <-daemonDone:
		runErr = daemonErr
	case <-time.After(cfg.ShutdownTimeout + 10*time.Second):
		runErr = errors.New("demo daemon did not stop in time")
	}

	fmt.Fprintf(out, "\ndemo: finished after %.0f s. Alerts raised and cleared:\n", time.Since(start).Seconds())
	sum := v.summary()
	if len(sum) == 0 {
		fmt.Fprintln(out, "  (no alerts)")
	}
	for _, l := range sum {
		fmt.Fprintln(out, "  "+l)
	}
	fmt.Fprintln(out, "\n"+Caution)
	if perr != nil && !errors.Is(perr, context.Canceled) {
		return perr
	}
	return runErr
}

// waitUntil polls cond every 20 ms until it holds or d has passed.
func waitUntil(d time.Duration, cond func() bool) {
	deadline := time.Now().Add(d)
	for !cond() && time.Now().Before(deadline) {
		time.Sleep(20 * time.Millisecond)
	}
}
