package cli

import (
	"errors"
	"math"
	"os"
	"runtime/debug"
	"strconv"

	"github.com/KimMachineGun/automemlimit/memlimit"
	"github.com/rs/zerolog"

	"trapline/config"
)

// autoMemRatio is the share of the control group's memory limit that
// memory_limit: auto takes as the soft limit: the rest is left for what the
// Go runtime does not count (stacks of threads outside Go, the binary's
// pages) and for the collector to catch up before the hard limit kills the
// process (common practice; the library's default).
const autoMemRatio = 0.9

// applyMemoryLimit sets the Go runtime's soft memory limit from
// memory_limit: a size as it is, auto as autoMemRatio of what from reports
// (the control group's limit in the daemon), nothing for 0. A GOMEMLIMIT set
// in the environment wins over auto, as the runtime already applied it, and
// the environment variable AUTOMEMLIMIT of the library that reads the
// control group (KimMachineGun/automemlimit) turns auto off ("off") or
// replaces the share (a number in (0, 1]). A limit that cannot be read
// leaves the runtime's own and says why; it never stops the daemon. It
// returns the soft limit in force afterwards.
func applyMemoryLimit(m config.MemLimit, from memlimit.Provider, log zerolog.Logger) int64 {
	switch {
	case m > 0:
		debug.SetMemoryLimit(int64(m))
		log.Info().Int64("memory_limit_bytes", int64(m)).Msg("soft memory limit set")
	case m == config.MemLimitAuto:
		if v := os.Getenv("GOMEMLIMIT"); v != "" {
			log.Info().Str("gomemlimit", v).Msg("memory_limit auto: GOMEMLIMIT is set in the environment and stays in force")
			break
		}
		if os.Getenv("AUTOMEMLIMIT") == "off" {
			// The library's own switch (it also reads a ratio from it).
			log.Info().Msg("memory_limit auto: AUTOMEMLIMIT=off in the environment; no soft limit set")
			break
		}
		lim, err := memlimit.Set(memlimit.WithProvider(from), memlimit.WithRatio(autoMemRatio))
		switch {
		case errors.Is(err, memlimit.ErrNoLimit) || err == nil && lim == math.MaxInt64:
			log.Info().Msg("memory_limit auto: the control group sets no memory limit; no soft limit set")
		case err != nil:
			log.Warn().Err(err).Msg("memory_limit auto: the control group's memory limit could not be read; no soft limit set")
		default:
			share := strconv.FormatFloat(autoMemRatio, 'g', -1, 64)
			if v := os.Getenv("AUTOMEMLIMIT"); v != "" {
				share = v // the library took it (it refuses one it cannot read)
			}
			log.Info().Int64("memory_limit_bytes", lim).Str("share_of_cgroup_limit", share).Msg("soft memory limit set from the control group's limit")
		}
	}
	return debug.SetMemoryLimit(-1)
}
