package cli

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/spf13/cobra"

	"trapline/alerts"
	"trapline/config"
	"trapline/daemon"
	"trapline/daemon/bus"
)

// natsClient returns the connection options of a client verb: those of
// the configuration file's nats section when one is given (--nats-url,
// when set, overrides its url), else the plain --nats-url. With a file it
// also returns the file's subject prefix.
func natsClient(name, url, cfgPath string, urlSet bool) (bus.ClientOptions, string, error) {
	if cfgPath == "" {
		return bus.ClientOptions{URL: url, Name: name}, "", nil
	}
	cfg, err := config.Load(cfgPath, nil)
	if err != nil {
		return bus.ClientOptions{}, "", &daemon.UsageError{Err: err}
	}
	co := bus.ClientFromConfig(&cfg.NATS, name)
	if urlSet || co.URL == "" {
		co.URL = url
	}
	return co, cfg.NATS.SubjectPrefix, nil
}

// errAckRefused marks an acknowledgement the daemon answered with a
// refusal.
var errAckRefused = errors.New("acknowledgement refused")

func (a *app) ackCommand() *cobra.Command {
	var url, cfgPath, prefix, by, why string
	var timeout time.Duration
	cmd := &cobra.Command{
		Use:   "ack ALERT-ID --by NAME [--why TEXT]",
		Short: "Acknowledge an active alarm of a running daemon over NATS",
		Long: "ack sends an acknowledgement request for the alarm with the given id (as in the alert\n" +
			"events, <stream>/<condition>/<unix ms>) to the daemon that analyses its stream, and prints\n" +
			"the daemon's answer. The acknowledged event goes out on the alert subject like any other.\n" +
			"It exits 1 when the daemon refuses (an unknown or cleared id) or does not answer.\n\n" +
			"  trapline ack bed-1/air-trapping/1772359200123 --by 'J. Doe' --why 'settings changed'\n\n" + Caution,
		Args: func(_ *cobra.Command, args []string) error {
			if len(args) != 1 {
				return usageErrorf("give the id of one alert, as in its events: <stream>/<condition>/<unix ms>")
			}
			return nil
		},
		RunE: func(cmd *cobra.Command, args []string) error {
			id := args[0]
			stream, _, ok := strings.Cut(id, "/")
			if !ok || stream == "" {
				return usageErrorf("alert id %q: want <stream>/<condition>/<unix ms>", id)
			}
			if strings.TrimSpace(by) == "" {
				return usageErrorf("--by: say who acknowledges")
			}
			co, p, err := natsClient("trapline ack", url, cfgPath, cmd.Flags().Changed("nats-url"))
			if err != nil {
				return err
			}
			if p != "" && !cmd.Flags().Changed("prefix") {
				prefix = p
			}
			nc, err := bus.Connect(co, a.log)
			if err != nil {
				return err
			}
			defer nc.Close()
			req, _ := json.Marshal(bus.AckRequest{ID: id, By: by, Why: why})
			subject := alerts.Subjects{Prefix: prefix}.Ack(stream)
			ctx, cancel := context.WithTimeout(cmd.Context(), timeout)
			defer cancel()
			msg, err := nc.RequestWithContext(ctx, subject, req)
			if err != nil {
				return fmt.Errorf("ack %s on %s: %w (is the daemon running and reachable?)", id, subject, err)
			}
			fmt.Fprintln(cmd.OutOrStdout(), string(msg.Data))
			var r bus.AckReply
			if err := json.Unmarshal(msg.Data, &r); err != nil {
				return fmt.Errorf("ack %s: unreadable reply: %w", id, err)
			}
			if !r.OK {
				return fmt.Errorf("%w: %s", errAckRefused, r.Error)
			}
			return nil
		},
	}
	f := cmd.Flags()
	f.StringVar(&url, "nats-url", defaultNATSURL, "NATS server of the daemon")
	f.StringVarP(&cfgPath, "config", "c", "", "configuration file whose nats section (url, credentials, TLS, subject_prefix) applies")
	f.StringVar(&prefix, "prefix", alerts.DefaultPrefix, "subject prefix of the daemon (nats.subject_prefix)")
	f.StringVar(&by, "by", "", "who acknowledges (required)")
	f.StringVar(&why, "why", "", "why (logged by the daemon)")
	f.DurationVar(&timeout, "timeout", 10*time.Second, "how long to wait for the answer")
	return cmd
}
