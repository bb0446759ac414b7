package cli

import (
	"context"
	"io"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/spf13/cobra"

	"trapline/daemon/bus"
)

// defaultNATSURL is where the embedded server listens by default.
const defaultNATSURL = "nats://127.0.0.1:4222"

// watchOptions configures the live view.
type watchOptions struct {
	Prefix string
	Since  time.Duration
	JSON   bool
	// Plain forces line output even on a terminal.
	Plain bool
	// Status adds the status heartbeats to the JSON output (they are not
	// part of the breath and alert contracts).
	Status bool
	// Streams limits the view to these stream ids; empty means all.
	Streams []string
	// PlainEvery is the period of the per-stream lines in plain output.
	PlainEvery time.Duration
	// RedrawEvery is the period of the terminal redraw.
	RedrawEvery time.Duration
	// Footer, when set, closes the terminal view (the demo's caution).
	Footer string
	// Loc is the time zone of the wall times shown; nil means local time.
	Loc *time.Location
	// Width is the width of plain output (0: 80 columns); a terminal's
	// own width is used on a terminal.
	Width int
}

func (a *app) watchCommand() *cobra.Command {
	var (
		url, cfgPath string
		opts         = watchOptions{Prefix: "trapline", Since: time.Hour}
	)
	cmd := &cobra.Command{
		Use:   "watch",
		Short: "Show live breaths and alerts from NATS (a terminal view, or NDJSON with --json)",
		Long: "watch subscribes to the breath, status and alert subjects of a running trapline and shows\n" +
			"one line per stream with its latest breath figures (in columns with units, fitted to the\n" +
			"terminal: EEF and Te/τ always, more on wider terminals) and open alarms, and a log of alert\n" +
			"events in which an escalation reads as one alarm moving up. On start it replays the alerts\n" +
			"of the last --since from JetStream.\n" +
			"With --json it prints the breath records and alert events as NDJSON, for scripts (--status\n" +
			"adds the status heartbeats).\n\n" + Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if opts.Width != 0 && (opts.Width < 40 || opts.Width > 1000) {
				return usageErrorf("--width %d: want 40 to 1000 columns", opts.Width)
			}
			if opts.Since < 0 {
				return usageErrorf("--since %v: must not be negative", opts.Since)
			}
			if opts.Prefix == "" || strings.ContainsAny(opts.Prefix, " *>") {
				return usageErrorf("--prefix %q: want a subject prefix without spaces or wildcards", opts.Prefix)
			}
			ctx := cmd.Context()
			co, prefix, err := watchClient(url, cfgPath, cmd.Flags().Changed("nats-url"))
			if err != nil {
				return err
			}
			if prefix != "" && !cmd.Flags().Changed("prefix") {
				opts.Prefix = prefix
			}
			nc, err := bus.Connect(co, a.log)
			if err != nil {
				return err
			}
			defer nc.Close()
			// The alert replay needs JetStream: wait for the server rather
			// than fall back to live alerts only.
			if !nc.IsConnected() {
				a.log.Warn().Str("url", bus.RedactURL(co.URL)).Msg("waiting for NATS")
				for !nc.IsConnected() {
					select {
					case <-ctx.Done():
						return nil
					case <-time.After(100 * time.Millisecond):
					}
				}
			}
			return runWatch(ctx, nc, opts, cmd.OutOrStdout(), a.log.Warn)
		},
	}
	f := cmd.Flags()
	f.StringVar(&url, "nats-url", defaultNATSURL, "NATS server to read from")
	f.StringVarP(&cfgPath, "config", "c", "", "configuration file whose nats section (url, credentials, TLS) applies")
	f.StringVar(&opts.Prefix, "prefix", opts.Prefix, "subject prefix of the daemon (nats.subject_prefix)")
	f.DurationVar(&opts.Since, "since", opts.Since, "replay the alert events of this last period on start (0: none)")
	f.BoolVar(&opts.JSON, "json", false, "print breath records and alert events as NDJSON instead of the view")
	f.BoolVar(&opts.Plain, "plain", false, "plain line output even on a terminal")
	f.IntVar(&opts.Width, "width", 0, "width of plain output in columns (default 80; a terminal's own width is used on a terminal)")
	f.BoolVar(&opts.Status, "status", false, "with --json, also print the status heartbeats")
	f.StringSliceVar(&opts.Streams, "stream", nil, "show only these streams (repeat or comma-separate)")
	return cmd
}

// watchClient returns the connection options of watch: those of the
// configuration file's nats section when one is given (--nats-url, when
// set, overrides its url), else the plain --nats-url. With a file it also
// returns the file's subject prefix.
func watchClient(url, cfgPath string, urlSet bool) (bus.ClientOptions, string, error) {
	return natsClient("trapline watch", url, cfgPath, urlSet)
}

// runWatch shows what arrives on nc until ctx is cancelled. warn logs
// problems that do not stop the view.
func runWatch(ctx context.Context, nc *nats.Conn, opts watchOptions, out io.Writer, warn logFunc) error {
	v := newWatchView(out, opts)
	subs, err := v.subscribe(ctx, nc, warn)
	if err != nil {
		return err
	}
	defer func() {
		for _, s := range subs {
			s()
		}
	}()
	v.loop(ctx)
	return nil
}
