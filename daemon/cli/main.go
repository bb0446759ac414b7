package cli

import (
	"context"
	"errors"
	"fmt"
	"io"
	"os"
	"os/signal"
	"runtime/pprof"
	"strings"
	"syscall"

	"github.com/rs/zerolog"
	"github.com/spf13/cobra"

	"trapline/daemon"
)

// Exit codes of the trapline command.
const (
	ExitOK    = 0
	ExitError = 1
	// ExitUsage is returned for bad usage or a bad configuration.
	ExitUsage = 2
)

// Caution is the safety notice that the README, the demo and every
// prediction carry.
const Caution = "CAUTION: research use only. trapline is not a medical device and does not replace the " +
	"ventilator's own alarms. Its alerts and predictions are model outputs, never instructions; local " +
	"protocols and licensed clinicians decide."

// usageErrorf returns a UsageError with a formatted message.
func usageErrorf(format string, args ...any) error {
	return &daemon.UsageError{Err: fmt.Errorf(format, args...)}
}

// app holds what every verb shares: streams and the logger.
type app struct {
	stdin    io.Reader
	stdout   io.Writer
	stderr   io.Writer
	logLevel string
	log      zerolog.Logger
	// cpuProfile is the file of --cpu-profile; stopProfile ends it.
	cpuProfile  string
	stopProfile func()
}

// Main runs the trapline command line with args (without the program name)
// and returns the process exit code. SIGINT and SIGTERM cancel the context
// of the running verb; a second signal exits at once.
func Main(args []string) int {
	ctx, stop := signal.NotifyContext(context.Background(), os.Interrupt, syscall.SIGTERM)
	defer stop()
	go func() {
		<-ctx.Done()
		stop() // restore default handling: a second signal kills the process
	}()
	return Run(ctx, args, os.Stdin, os.Stdout, os.Stderr)
}

// Run is Main without the process: tests call it with their own context and
// streams.
func Run(ctx context.Context, args []string, stdin io.Reader, stdout, stderr io.Writer) int {
	a := &app{stdin: stdin, stdout: stdout, stderr: stderr}
	root := a.rootCommand()
	root.SetArgs(args)
	root.SetIn(stdin)
	root.SetOut(stdout)
	root.SetErr(stderr)
	err := root.ExecuteContext(ctx)
	if a.stopProfile != nil {
		a.stopProfile()
	}
	if err == nil {
		return ExitOK
	}
	fmt.Fprintf(stderr, "trapline: %v\n", err)
	var ue *daemon.UsageError
	if errors.As(err, &ue) || isCobraUsageError(err) {
		return ExitUsage
	}
	return ExitError
}

func (a *app) rootCommand() *cobra.Command {
	root := &cobra.Command{
		Use:   "trapline",
		Short: "Breath-by-breath air-trapping analysis and alerts for ventilation research",
		Long: "trapline reads airway pressure and flow, splits them into breaths, estimates respiratory\n" +
			"mechanics, trapped volume and intrinsic PEEP, and raises alerts on NATS.\n\n" + Caution,
		SilenceUsage:  true,
		SilenceErrors: true,
		PersistentPreRunE: func(cmd *cobra.Command, _ []string) error {
			log, err := newLogger(a.stderr, a.logLevel)
			if err != nil {
				return &daemon.UsageError{Err: err}
			}
			a.log = log
			return a.startProfile()
		},
	}
	root.PersistentFlags().StringVar(&a.logLevel, "log-level", "info", "log level: trace, debug, info, warn, error")
	root.PersistentFlags().StringVar(&a.cpuProfile, "cpu-profile", "", "write a CPU profile of the whole run to `FILE` (go tool pprof)")
	root.SetFlagErrorFunc(func(_ *cobra.Command, err error) error { return &daemon.UsageError{Err: err} })
	root.AddCommand(
		a.analyzeCommand(),
		a.predictCommand(),
		a.plotCommand(),
		a.runCommand(),
		a.watchCommand(),
		a.demoCommand(),
		a.simCommand(),
		a.sweepCommand(),
		a.versionCommand(),
		a.configCommand(),
		a.ackCommand(),
		a.exportCommand(),
	)
	return root
}

// startProfile starts the CPU profile of --cpu-profile, if one is asked for;
// Run stops it when the verb returns, so a daemon stopped by a signal
// writes it too.
func (a *app) startProfile() error {
	if a.cpuProfile == "" {
		return nil
	}
	f, err := os.Create(a.cpuProfile)
	if err != nil {
		return &daemon.UsageError{Err: fmt.Errorf("--cpu-profile: %w", err)}
	}
	if err := pprof.StartCPUProfile(f); err != nil {
		_ = f.Close()
		return fmt.Errorf("--cpu-profile: %w", err)
	}
	a.stopProfile = func() {
		pprof.StopCPUProfile()
		if err := f.Close(); err != nil {
			a.log.Warn().Err(err).Str("file", a.cpuProfile).Msg("CPU profile not written")
		}
	}
	return nil
}

// isCobraUsageError recognises cobra's own argument errors (unknown verb,
// wrong number of arguments), which it returns as plain errors.
func isCobraUsageError(err error) bool {
	msg := err.Error()
	for _, p := range []string{"unknown command", "accepts ", "requires at least", "requires at most", "unknown flag", "unknown shorthand"} {
		if strings.Contains(msg, p) {
			return true
		}
	}
	return false
}
