package input

import (
	"os"

	"github.com/mattn/go-isatty"
	"github.com/schollz/progressbar/v3"
)

// ProgressBar returns an Options.Progress that draws a progress bar on out
// when out is a terminal, and nil (no progress, nothing printed) when it is
// not, so that piped output stays clean.
func ProgressBar(out *os.File, description string) func(done, total int64) {
	if out == nil || !(isatty.IsTerminal(out.Fd()) || isatty.IsCygwinTerminal(out.Fd())) {
		return nil
	}
	var bar *progressbar.ProgressBar
	return func(done, total int64) {
		if bar == nil {
			bar = progressbar.NewOptions64(total,
				progressbar.OptionSetWriter(out),
				progressbar.OptionSetDescription(description),
				progressbar.OptionShowBytes(true),
				progressbar.OptionThrottle(100e6),
				progressbar.OptionClearOnFinish(),
			)
		}
		_ = bar.Set64(done)
		if total > 0 && done >= total {
			_ = bar.Finish()
		}
	}
}
