package cli

import (
	"fmt"
	"io"

	"github.com/KimMachineGun/automemlimit/memlimit"
	"github.com/rs/zerolog"
	"github.com/spf13/cobra"

	"trapline/config"
	"trapline/daemon"
)

func (a *app) runCommand() *cobra.Command {
	var cfgPath string
	cmd := &cobra.Command{
		Use:   "run",
		Short: "Run the daemon: read every configured stream, analyse breaths, deliver alerts to NATS",
		Long: "run reads the streams of the configuration file, analyses them breath by breath and publishes\n" +
			"breath records, status heartbeats and alerts on NATS (an embedded server unless nats.url is\n" +
			"set). Alerts go through a local spool and JetStream and are never lost. SIGINT or SIGTERM\n" +
			"stops it cleanly within shutdown_timeout; a second signal stops it at once.\n\n" + Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			cfg, err := config.Load(cfgPath, cmd.Flags())
			if err != nil {
				return &daemon.UsageError{Err: err}
			}
			if len(cfg.Streams) == 0 && len(cfg.Sources) == 0 && cfg.Role != config.RoleWorker {
				where := "the configuration"
				if cfgPath != "" {
					where = cfgPath
				}
				return usageErrorf("no stream configured: add at least one entry under streams: or sources: in %s "+
					"(see config/trapline.example.yaml), or try `trapline demo`", where)
			}
			// log.level and log.format come from the file, the environment
			// or --log-level (config.Load takes the flag into account).
			log, err := configLogger(a.stderr, cfg.Log.Level, cfg.Log.Format)
			if err != nil {
				return &daemon.UsageError{Err: err}
			}
			applyMemoryLimit(cfg.MemoryLimit, memlimit.FromCgroup, log)
			d, err := daemon.New(cfg, log, daemon.Options{})
			if err != nil {
				return err
			}
			return d.Run(cmd.Context())
		},
	}
	f := cmd.Flags()
	f.StringVarP(&cfgPath, "config", "c", "", "configuration file (YAML, TOML or JSON)")
	f.String("data-dir", "", "directory of the JetStream store and the alert spool (data_dir)")
	f.String("nats-url", "", "connect to this NATS server instead of running the embedded one (nats.url)")
	f.String("http-listen", "", "address of /healthz, /readyz and /metrics (http.listen)")
	return cmd
}

// configLogger is newLogger with the log.format setting: auto (console
// text on a terminal, JSON lines otherwise), console or json.
func configLogger(w io.Writer, level, format string) (zerolog.Logger, error) {
	switch format {
	case "", "auto":
		return newLogger(w, level)
	case "console", "json":
	default:
		return zerolog.Nop(), fmt.Errorf("log.format %q: want auto, console or json", format)
	}
	lvl, err := zerolog.ParseLevel(level)
	if err != nil || level == "" {
		return zerolog.Nop(), fmt.Errorf("log.level %q: want trace, debug, info, warn or error", level)
	}
	out := w
	if format == "console" {
		out = zerolog.ConsoleWriter{Out: w, TimeFormat: consoleTimeFormat, NoColor: true}
	}
	return zerolog.New(out).Level(lvl).With().Timestamp().Logger(), nil
}
