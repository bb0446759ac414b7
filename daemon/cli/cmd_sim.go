package cli

import (
	"context"
	"errors"
	"fmt"
	"io"
	"math"
	"os"
	"strconv"
	"syscall"
	"text/tabwriter"
	"time"

	"github.com/rs/zerolog"
	"github.com/spf13/cobra"
	"github.com/spf13/pflag"

	"trapline/daemon"
	"trapline/ingest"
	"trapline/simulator"
)

// simFlags are the options of `trapline sim`.
type simFlags struct {
	scenario, speed, format, out, link, truth, stream string
	list, noise                                       bool
	decimals, patients                                int
	ward                                              []string
	duration                                          time.Duration
	seed                                              uint64
	resistance, compliance, tidalVolume, flow         float64
	inspTime, rate, pause, peep, sampleRate           float64
}

// simNoise is what --noise adds to a steady patient: a sensor of
// ordinary quality.
var simNoise = simulator.Sensor{PressureNoiseCmH2O: 0.2, FlowNoiseLPM: 0.5}

func (a *app) simCommand() *cobra.Command {
	f := simFlags{speed: "1", format: "text", out: "-", decimals: 4, duration: 120 * time.Second,
		resistance: 10, compliance: 50, tidalVolume: 500, flow: 50, rate: 15, peep: 5, sampleRate: 100}
	cmd := &cobra.Command{
		Use:   "sim",
		Short: "Stream a simulated patient's airway pressure and flow (a scenario, or a steady patient from flags)",
		Long: "sim runs a simulated patient on a simulated ventilator and writes its samples in the sample\n" +
			"line format v1 (or the binary framing) to stdout, a file, a TCP peer or listener, UDP, or a\n" +
			"pseudo-terminal that stands in for a serial cable. A shipped or YAML scenario scripts changes\n" +
			"and events; without one, the flags describe a steady passive patient on volume control.\n" +
			"--truth writes the true mechanics and conditions of every breath as NDJSON.\n\n" +
			"  trapline sim --resistance 25 --compliance 60 --tidal-volume 600 --flow 45 --rate 24 --peep 5 --speed max\n" +
			"  trapline sim --scenario bronchospasm --speed 10 --out pty --link /tmp/vent0 --truth truth.ndjson\n" +
			"  trapline sim --patients 20 --ward stable,bronchospasm --speed 1 --out tcp://127.0.0.1:5501\n\n" +
			Caution,
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			if f.list {
				return listScenarios(cmd.OutOrStdout())
			}
			return a.runSim(cmd.Context(), cmd.Flags(), f, cmd.OutOrStdout())
		},
	}
	fl := cmd.Flags()
	fl.StringVar(&f.scenario, "scenario", "", "shipped scenario name (see --list) or YAML file")
	fl.BoolVar(&f.list, "list", false, "list the shipped scenarios and exit")
	fl.Float64Var(&f.resistance, "resistance", f.resistance, "airway resistance, cmH2O·s/L")
	fl.Float64Var(&f.compliance, "compliance", f.compliance, "compliance, mL/cmH2O")
	fl.Float64Var(&f.tidalVolume, "tidal-volume", f.tidalVolume, "tidal volume, mL")
	fl.Float64Var(&f.flow, "flow", f.flow, "inspiratory flow, L/min (square)")
	fl.Float64Var(&f.inspTime, "insp-time", 0, "inspiratory time including pause, s (instead of --flow)")
	fl.Float64Var(&f.rate, "rate", f.rate, "ventilator rate, /min")
	fl.Float64Var(&f.pause, "pause", 0, "end-inspiratory pause, s")
	fl.Float64Var(&f.peep, "peep", f.peep, "PEEP, cmH2O")
	fl.Float64Var(&f.sampleRate, "sample-rate", f.sampleRate, "sample rate, Hz (25 to 1000)")
	fl.DurationVar(&f.duration, "duration", f.duration, "simulated duration, e.g. 120s or 15m")
	fl.Uint64Var(&f.seed, "seed", 0, "seed of the sensor noise (same seed, same bytes)")
	fl.BoolVar(&f.noise, "noise", false, "add sensor noise (0.2 cmH2O, 0.5 L/min) to a steady patient")
	fl.StringVar(&f.speed, "speed", f.speed, "simulated seconds per second: 1 (real time), N, or max")
	fl.StringVar(&f.format, "format", f.format, "sample format: text or binary")
	fl.IntVar(&f.decimals, "decimals", f.decimals, "text digits after the decimal point (0: shortest exact)")
	fl.StringVar(&f.out, "out", f.out, "output: -, a file path, tcp://HOST:PORT, tcp-listen://HOST:PORT, udp://HOST:PORT, or pty")
	fl.StringVar(&f.link, "link", "", "with --out pty: keep a symbolic link at PATH to the current pseudo-terminal")
	fl.StringVar(&f.truth, "truth", "", "write the ground truth of every breath as NDJSON to FILE (- for stdout)")
	fl.StringVar(&f.stream, "stream", "", "stream id written with the samples (in text, as a stream column)")
	fl.IntVar(&f.patients, "patients", 0, "simulate N patients on one output as streams bed-1 … bed-N (scenarios of --ward in turn)")
	fl.StringSliceVar(&f.ward, "ward", nil, "scenarios of a ward, taken in turn by the patients (comma-separated)")
	return cmd
}

// listScenarios prints the shipped scenarios with their descriptions.
func listScenarios(w io.Writer) error {
	tw := tabwriter.NewWriter(w, 0, 4, 2, ' ', 0)
	for _, name := range simulator.ShippedNames() {
		sc, err := simulator.Shipped(name)
		if err != nil {
			return err
		}
		fmt.Fprintf(tw, "%s\t%s\t%s\n", name, time.Duration(float64(sc.DurationS)*float64(time.Second)), sc.Description)
	}
	return tw.Flush()
}

// simScenario builds the scenario of the flags: a shipped or YAML scenario
// with the explicitly given flags laid over it, or a steady patient.
func simScenario(fl *pflag.FlagSet, f simFlags) (simulator.Scenario, error) {
	var sc simulator.Scenario
	if f.scenario != "" {
		var err error
		if sc, err = simulator.LoadScenario(f.scenario); err != nil {
			return sc, &daemon.UsageError{Err: fmt.Errorf("--scenario: %w", err)}
		}
	} else {
		sc = simulator.Steady{
			RCmH2OSPerL: f.resistance, CMLPerCmH2O: f.compliance, VtML: f.tidalVolume, FlowLPM: f.flow,
			RateBPM: f.rate, PEEPCmH2O: f.peep, PauseS: f.pause, SampleRateHz: f.sampleRate,
			DurationS: f.duration.Seconds(), Seed: f.seed,
		}.Scenario()
		if f.noise {
			sc.Sensor = simNoise
		}
	}
	set := func(name string, apply func()) {
		if fl.Changed(name) {
			apply()
		}
	}
	set("resistance", func() { sc.Patient.ResistanceCmH2OSPerL = f.resistance })
	set("compliance", func() { sc.Patient.ComplianceMLPerCmH2O = f.compliance })
	set("tidal-volume", func() { sc.Ventilator.TidalVolumeML = f.tidalVolume })
	set("flow", func() { sc.Ventilator.FlowLPM = f.flow })
	set("insp-time", func() {
		sc.Ventilator.InspTimeS = f.inspTime
		if !fl.Changed("flow") {
			sc.Ventilator.FlowLPM = 0
		}
	})
	set("rate", func() { sc.Ventilator.RateBPM = f.rate })
	set("pause", func() { sc.Ventilator.PauseS = f.pause })
	set("peep", func() { sc.Ventilator.PEEPCmH2O = f.peep })
	set("sample-rate", func() { sc.SampleRateHz = f.sampleRate })
	set("duration", func() { sc.DurationS = simulator.Seconds(f.duration.Seconds()) })
	set("seed", func() { sc.Seed = f.seed })
	set("noise", func() {
		if f.noise && f.scenario != "" {
			sc.Sensor.PressureNoiseCmH2O = math.Max(sc.Sensor.PressureNoiseCmH2O, simNoise.PressureNoiseCmH2O)
			sc.Sensor.FlowNoiseLPM = math.Max(sc.Sensor.FlowNoiseLPM, simNoise.FlowNoiseLPM)
		}
	})
	set("stream", func() { sc.Stream = f.stream })
	if sc.Stream != "" && !ingest.ValidStreamID(sc.Stream) {
		return sc, usageErrorf("--stream %q: want 1 to 32 letters, digits, '-' or '_'", sc.Stream)
	}
	return sc, nil
}

// parseSpeed reads --speed: a positive number or "max".
func parseSpeed(s string) (float64, error) {
	if s == "max" {
		return math.Inf(1), nil
	}
	v, err := strconv.ParseFloat(s, 64)
	if err != nil || !(v > 0) || math.IsInf(v, 0) {
		return 0, usageErrorf("--speed %q: want a positive number or max", s)
	}
	return v, nil
}

// checkSimFlags validates the flags that need no scenario.
func checkSimFlags(f simFlags) (speed float64, format ingest.Format, err error) {
	if speed, err = parseSpeed(f.speed); err != nil {
		return 0, format, err
	}
	if format, err = ingest.ParseFormat(f.format); err != nil {
		return 0, format, &daemon.UsageError{Err: fmt.Errorf("--format: %w", err)}
	}
	switch {
	case f.decimals < 0 || f.decimals > 17:
		return 0, format, usageErrorf("--decimals %d: want 0 to 17", f.decimals)
	case f.link != "" && f.out != "pty":
		return 0, format, usageErrorf("--link needs --out pty")
	case f.truth == "-" && f.out == "-":
		return 0, format, usageErrorf("--truth -: stdout already carries the samples; give --truth a file")
	case f.patients < 0 || f.patients > 1000:
		return 0, format, usageErrorf("--patients %d: want 1 to 1000", f.patients)
	case f.patients > 0 && f.stream != "":
		return 0, format, usageErrorf("--stream names one patient; with --patients the streams are bed-1 … bed-N")
	}
	return speed, format, nil
}

// simOutput opens the output of --out; on a pseudo-terminal it prints the
// slave path on stdout unless stdout carries the truth.
func simOutput(f simFlags, stdout io.Writer, log zerolog.Logger) (simulator.Output, error) {
	out, err := simulator.ParseOutput(f.out, simulator.OutputOptions{
		Stdout:   stdout,
		Link:     f.link,
		OnStatus: func(msg string) { log.Info().Msg(msg) },
		OnPTY: func(path string) {
			if f.truth != "-" {
				fmt.Fprintln(stdout, path)
			}
		},
	})
	if err != nil {
		return nil, &daemon.UsageError{Err: fmt.Errorf("--out: %w", err)}
	}
	return out, nil
}

// simTruth opens the --truth writer; close releases it.
// simSinks opens the output of the samples and the writer of the ground
// truth (nil without --truth); closeTruth is always safe to call.
func simSinks(f simFlags, stdout io.Writer, log zerolog.Logger) (out simulator.Output, truth io.Writer, closeTruth func(), err error) {
	if out, err = simOutput(f, stdout, log); err != nil {
		return nil, nil, nil, err
	}
	if truth, closeTruth, err = simTruth(f, stdout); err != nil {
		return nil, nil, nil, err
	}
	return out, truth, closeTruth, nil
}

func simTruth(f simFlags, stdout io.Writer) (w io.Writer, close func(), err error) {
	switch f.truth {
	case "":
		return nil, func() {}, nil
	case "-":
		return stdout, func() {}, nil
	}
	tf, err := os.Create(f.truth)
	if err != nil {
		return nil, nil, fmt.Errorf("--truth: %w", err)
	}
	return tf, func() { tf.Close() }, nil
}

// simEnded turns the end of a simulation into the verb's result.
func simEnded(log zerolog.Logger, st simulator.StreamStats, err error) error {
	switch {
	case errors.Is(err, context.Canceled):
		log.Info().Uint64("samples", st.Samples).Msg("stopped")
		return nil
	case errors.Is(err, syscall.EPIPE):
		return nil // the reader went away (trapline sim | head)
	case err != nil:
		return err
	}
	log.Info().Uint64("samples", st.Samples).Uint64("breaths", st.Breaths).Msg("done")
	return nil
}

func (a *app) runSim(ctx context.Context, fl *pflag.FlagSet, f simFlags, stdout io.Writer) error {
	speed, format, err := checkSimFlags(f)
	if err != nil {
		return err
	}
	sc, err := simScenario(fl, f)
	if err != nil {
		return err
	}
	if f.patients > 0 || len(f.ward) > 0 {
		return a.runWard(ctx, f, sc, speed, format, stdout)
	}
	sim, err := simulator.New(sc)
	if err != nil {
		return &daemon.UsageError{Err: err}
	}
	var enc ingest.Encoder
	if format == ingest.FormatBinary {
		enc, err = ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: sc.SampleRateHz, Time: true})
	} else {
		enc, err = ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: f.decimals})
	}
	if err != nil {
		return fmt.Errorf("encoder: %w", err)
	}
	log := a.log.With().Str("component", "sim").Str("stream", sim.Stream()).Logger()
	out, truth, closeTruth, err := simSinks(f, stdout, log)
	if err != nil {
		return err
	}
	defer closeTruth()
	opts := simulator.StreamOptions{
		Encoder: enc, Speed: speed, Truth: truth,
		// A stream id given on purpose goes into the text too, so that
		// several writers on one source stay apart at the reader.
		StreamColumn: fl.Changed("stream"),
		OnLink: func(ev simulator.LinkEvent) {
			log.Info().Float64("t_s", ev.TimeS).Bool("up", ev.Up).Msg("scripted link change")
		},
	}
	log.Info().Str("scenario", sc.Name).Float64("duration_s", sim.DurationS()).Float64("sample_rate_hz", sim.SampleRateHz()).
		Str("speed", f.speed).Str("out", f.out).Msg("simulating")
	st, err := simulator.Stream(ctx, sim, out, opts)
	return simEnded(log, st, err)
}

// runWard writes several patients to one output (--patients, --ward): the
// scenarios of --ward (or the one of the other flags) taken in turn, as
// streams bed-1 … bed-N, every line or frame naming its stream.
func (a *app) runWard(ctx context.Context, f simFlags, base simulator.Scenario, speed float64, format ingest.Format, stdout io.Writer) error {
	scs := []simulator.Scenario{base}
	if len(f.ward) > 0 {
		scs = scs[:0]
		for _, name := range f.ward {
			sc, err := simulator.LoadScenario(name)
			if err != nil {
				return &daemon.UsageError{Err: fmt.Errorf("--ward: %w", err)}
			}
			scs = append(scs, sc)
		}
	}
	n := f.patients
	if n == 0 {
		n = len(scs)
	}
	ward, err := simulator.WardScenarios(scs, n, "bed")
	if err != nil {
		return &daemon.UsageError{Err: err}
	}
	sims := make([]*simulator.Sim, len(ward))
	for i, sc := range ward {
		if sims[i], err = simulator.New(sc); err != nil {
			return &daemon.UsageError{Err: fmt.Errorf("patient %s: %w", sc.Stream, err)}
		}
	}
	log := a.log.With().Str("component", "sim").Int("patients", n).Logger()
	out, truth, closeTruth, err := simSinks(f, stdout, log)
	if err != nil {
		return err
	}
	defer closeTruth()
	log.Info().Str("speed", f.speed).Str("out", f.out).Msg("simulating a ward")
	st, err := simulator.StreamWard(ctx, sims, out, simulator.WardOptions{
		Format: format, Decimals: f.decimals, Speed: speed, Truth: truth,
		OnLink: func(stream string, ev simulator.LinkEvent) {
			log.Info().Str("stream", stream).Float64("t_s", ev.TimeS).Bool("up", ev.Up).Msg("scripted link change")
		},
	})
	return simEnded(log, st, err)
}
