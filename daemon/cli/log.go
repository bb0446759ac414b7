package cli

import (
	"fmt"
	"io"
	"os"
	"time"

	"github.com/mattn/go-isatty"
	"github.com/rs/zerolog"
)

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
		out = zerolog.ConsoleWriter{Out: w, TimeFormat: time.TimeOnly}
	}
	return zerolog.New(out).Level(lvl).With().Timestamp().Logger(), nil
}
