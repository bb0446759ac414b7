package cli

import (
	"fmt"
	"io"
	"os"

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"
)

// logTimeFormat stamps log lines to the millisecond (RFC 3339 with
// milliseconds): the scale-out roles are read side by side across
// processes, where a second is too coarse to order events.
const logTimeFormat = "2006-01-02T15:04:05.000Z07:00"

// consoleTimeFormat is the time of day to the millisecond.
const consoleTimeFormat = "15:04:05.000"

func init() { zerolog.TimeFieldFormat = logTimeFormat }

// newLogger returns a zerolog logger at the given level: human console
// output when w is a terminal, one JSON object per line otherwise (for
// journald and log shippers).
func newLogger(w io.Writer, level string) (zerolog.Logger, error) {
	lvl, err := zerolog.ParseLevel(level)
	if err != nil || level == "" {
		return zerolog.Nop(), fmt.Errorf("--log-level %q: want trace, debug, info, warn or error", level)
	}
	out := w
	if f, ok := w.(*os.File); ok && isatty.IsTerminal(f.Fd()) {
		out = zerolog.ConsoleWriter{Out: w, TimeFormat: consoleTimeFormat}
	}
	return zerolog.New(out).Level(lvl).With().Timestamp().Logger(), nil
}
