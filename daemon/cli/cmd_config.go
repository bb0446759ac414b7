package cli

import (
	"fmt"

	"github.com/spf13/cobra"

	"trapline/config"
	"trapline/daemon"
)

func (a *app) configCommand() *cobra.Command {
	cmd := &cobra.Command{
		Use:   "config",
		Short: "Show the effective configuration, or check a configuration file",
		Args:  cobra.NoArgs,
	}
	cmd.AddCommand(a.configShowCommand(), a.configCheckCommand())
	return cmd
}

func (a *app) configShowCommand() *cobra.Command {
	var cfgPath, format string
	cmd := &cobra.Command{
		Use:   "show",
		Short: "Print every effective value with its source (default, file, env, flag)",
		Long: "show loads the configuration as run would (defaults, then --config, then TRAPLINE_*\n" +
			"environment variables, then the flags below) and prints every key with its value and where\n" +
			"the value came from. Passwords and tokens are hidden. Exit 2 when the configuration is invalid.\n\n" +
			"  trapline config show --config /etc/trapline/trapline.yaml\n" +
			"  TRAPLINE_HTTP_LISTEN=:9100 trapline config show --format json | jq '.[] | select(.origin != \"default\")'",
		Args: cobra.NoArgs,
		RunE: func(cmd *cobra.Command, _ []string) error {
			switch format {
			case "text", "yaml", "json":
			default:
				return usageErrorf("--format %q: want text, yaml or json", format)
			}
			_, settings, err := config.LoadEffective(cfgPath, cmd.Flags())
			if err != nil {
				return &daemon.UsageError{Err: err}
			}
			return config.WriteSettings(cmd.OutOrStdout(), settings, format)
		},
	}
	f := cmd.Flags()
	f.StringVarP(&cfgPath, "config", "c", "", "configuration file (YAML, TOML or JSON)")
	f.StringVar(&format, "format", "text", "output: text, yaml or json")
	// The flags of run, so that their effect shows.
	f.String("data-dir", "", "as run --data-dir (data_dir)")
	f.String("nats-url", "", "as run --nats-url (nats.url)")
	f.String("http-listen", "", "as run --http-listen (http.listen)")
	return cmd
}

func (a *app) configCheckCommand() *cobra.Command {
	return &cobra.Command{
		Use:   "check FILE",
		Short: "Validate a configuration file without starting anything",
		Long: "check reads FILE (with the TRAPLINE_* environment variables, as run would) and reports every\n" +
			"problem by key at once: unknown keys, values of the wrong type, values out of range.\n" +
			"Exit 0 when it is valid, 2 otherwise.",
		Args: func(_ *cobra.Command, args []string) error {
			if len(args) != 1 {
				return usageErrorf("give one configuration file to check")
			}
			return nil
		},
		RunE: func(cmd *cobra.Command, args []string) error {
			cfg, err := config.Load(args[0], nil)
			if err != nil {
				return &daemon.UsageError{Err: err}
			}
			_, err = fmt.Fprintf(cmd.OutOrStdout(), "%s: valid (role %s, %s, config digest %s)\n",
				args[0], cfg.Role, plural(len(cfg.Streams), "stream", "streams"), cfg.Digest())
			return err
		},
	}
}
