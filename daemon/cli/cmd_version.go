package cli

import (
	"fmt"
	"runtime"
	"runtime/debug"

	"github.com/spf13/cobra"
)

// Version is the release version; set at build time with
// -ldflags "-X trapline/daemon/cli.Version=v1.2.3".
var Version = "dev"

func (a *app) versionCommand() *cobra.Command {
	return &cobra.Command{
		Use:   "version",
		Short: "Print the version of trapline and of the Go toolchain",
		Args:  cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			rev := "unknown"
			if info, ok := debug.ReadBuildInfo(); ok {
				for _, s := range info.Settings {
					if s.Key == "vcs.revision" {
						rev = s.Value
					}
				}
			}
			fmt.Fprintf(cmd.OutOrStdout(), "trapline %s (revision %s, %s %s/%s)\n", Version, rev, runtime.Version(), runtime.GOOS, runtime.GOARCH)
			return nil
		},
	}
}
