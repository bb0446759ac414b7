package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"os"
	"strings"
	"sync"
	"time"

	"github.com/mattn/go-isatty"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
	"golang.org/x/term"

	"trapline/alerts"
	"trapline/alerts/alarmbook"
	"trapline/analyze"
	"trapline/daemon/bus"
	"trapline/daemon/tui"
)

// logFunc starts a log event; zerolog's Logger.Warn has this shape.
type logFunc = func() *zerolog.Event

// watchView is the state behind the live view: a tui.Board with the
// latest breath and the alarms of every stream and the last alert events.
// It is safe for concurrent use by the NATS callbacks and the render loop.
type watchView struct {
	opts     watchOptions
	out      io.Writer
	terminal bool
	width    func() int

	mu    sync.Mutex
	board *tui.Board
	dirty bool
	err   error
}

// maxLogLines is how many alert events the terminal view keeps on screen.
const maxLogLines = 12

func newWatchView(out io.Writer, opts watchOptions) *watchView {
	if opts.PlainEvery <= 0 {
		opts.PlainEvery = 10 * time.Second
	}
	if opts.RedrawEvery <= 0 {
		opts.RedrawEvery = 250 * time.Millisecond
	}
	v := &watchView{opts: opts, out: out, board: tui.NewBoard(maxLogLines)}
	plainWidth := opts.Width
	if plainWidth <= 0 {
		plainWidth = tui.DefaultWidth
	}
	v.width = func() int { return plainWidth }
	if f, ok := out.(*os.File); ok && !opts.JSON && !opts.Plain && isatty.IsTerminal(f.Fd()) {
		v.terminal = true
		v.width = func() int {
			if w, _, err := term.GetSize(int(f.Fd())); err == nil && w > 20 {
				return w
			}
			return tui.DefaultWidth
		}
	}
	return v
}

// subscribe starts the subscriptions and returns their stop functions.
func (v *watchView) subscribe(ctx context.Context, nc *nats.Conn, warn logFunc) ([]func(), error) {
	var stops []func()
	for _, kind := range []string{"breath", "status"} {
		sub, err := nc.Subscribe(v.opts.Prefix+"."+kind+".>", func(m *nats.Msg) { v.handle(kind, m.Data) })
		if err != nil {
			return nil, fmt.Errorf("subscribe %s.%s.>: %w", v.opts.Prefix, kind, err)
		}
		stops = append(stops, func() { _ = sub.Unsubscribe() })
	}
	stop, err := v.subscribeAlerts(ctx, nc, warn)
	if err != nil {
		for _, s := range stops {
			s()
		}
		return nil, err
	}
	return append(stops, stop), nil
}

// subscribeAlerts reads alerts through an ordered consumer over the
// JetStream stream that holds them, starting --since ago, so that the view
// opens with the recent history and then follows live. Without JetStream
// (or no stream for the subject) it falls back to a plain subscription.
func (v *watchView) subscribeAlerts(ctx context.Context, nc *nats.Conn, warn logFunc) (func(), error) {
	subject := alerts.Subjects{Prefix: v.opts.Prefix}.All(alerts.KindAlert)
	plain := func() (func(), error) {
		sub, err := nc.Subscribe(subject, func(m *nats.Msg) { v.handle("alert", m.Data) })
		if err != nil {
			return nil, fmt.Errorf("subscribe %s: %w", subject, err)
		}
		return func() { _ = sub.Unsubscribe() }, nil
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return plain()
	}
	lctx, cancel := context.WithTimeout(ctx, 5*time.Second)
	defer cancel()
	name, err := js.StreamNameBySubject(lctx, subject)
	if err != nil {
		warn().Err(err).Str("subject", subject).Msg("no JetStream stream for alerts; showing live alerts only")
		return plain()
	}
	cfg := jetstream.OrderedConsumerConfig{FilterSubjects: []string{subject}, DeliverPolicy: jetstream.DeliverNewPolicy}
	if v.opts.Since > 0 {
		start := time.Now().Add(-v.opts.Since)
		cfg.DeliverPolicy = jetstream.DeliverByStartTimePolicy
		cfg.OptStartTime = &start
	}
	cons, err := js.OrderedConsumer(lctx, name, cfg)
	if err != nil {
		return nil, fmt.Errorf("ordered consumer on %s: %w", name, err)
	}
	cc, err := cons.Consume(func(m jetstream.Msg) { v.handle("alert", m.Data()) })
	if err != nil {
		return nil, fmt.Errorf("consume %s: %w", name, err)
	}
	return cc.Stop, nil
}

// wanted reports whether the stream passes the --stream filter.
func (v *watchView) wanted(stream string) bool {
	if len(v.opts.Streams) == 0 {
		return true
	}
	for _, s := range v.opts.Streams {
		if s == stream {
			return true
		}
	}
	return false
}

// handle takes one message of the given kind (breath, status, alert).
func (v *watchView) handle(kind string, data []byte) {
	v.mu.Lock()
	defer v.mu.Unlock()
	switch kind {
	case "breath":
		var b analyze.Breath
		if err := json.Unmarshal(data, &b); err != nil || !v.wanted(b.Stream) {
			return
		}
		v.board.Breath(&b)
	case "status":
		var st bus.StreamStatus
		if err := json.Unmarshal(data, &st); err != nil || !v.wanted(st.Stream) {
			return
		}
		v.board.Signal(st.Stream, st.Connected)
	case "alert":
		var ev alerts.Event
		if err := json.Unmarshal(data, &ev); err != nil || !v.wanted(ev.Stream) {
			return
		}
		// A replayed event (same id and state) is a Duplicate: shown once.
		ch := v.board.Alert(&ev)
		if ch.Kind == alarmbook.Duplicate {
			return
		}
		if !v.opts.JSON && !v.terminal {
			for _, l := range v.alertFormat(v.width()).Lines(&ev, ch) {
				v.write(l + "\n")
			}
		}
	}
	if v.opts.JSON && (kind != "status" || v.opts.Status) {
		v.write(string(data) + "\n")
	}
	v.dirty = true
}

// write writes to the output and remembers the first error (a closed pipe
// ends the view).
func (v *watchView) write(s string) {
	if v.err != nil {
		return
	}
	if _, err := io.WriteString(v.out, s); err != nil {
		v.err = err
	}
}

// loop redraws the view until ctx is cancelled or the output fails.
func (v *watchView) loop(ctx context.Context) {
	every := v.opts.RedrawEvery
	if !v.terminal {
		every = v.opts.PlainEvery
	}
	t := time.NewTicker(every)
	defer t.Stop()
	for {
		select {
		case <-ctx.Done():
			if v.terminal {
				v.mu.Lock()
				v.redraw()
				v.mu.Unlock()
			}
			return
		case <-t.C:
		}
		v.mu.Lock()
		switch {
		case v.opts.JSON:
		case v.terminal:
			if v.dirty {
				v.redraw()
			}
		default:
			for _, l := range v.plainLines() {
				v.write(l + "\n")
			}
		}
		v.dirty = false
		failed := v.err != nil
		v.mu.Unlock()
		if failed {
			return
		}
	}
}

// redraw paints the whole terminal view at the terminal's width now: a
// title, the streams with their open alarms, the alert log. Caller holds
// v.mu.
func (v *watchView) redraw() {
	w := v.width()
	var b strings.Builder
	b.WriteString("\x1b[H\x1b[2J")
	b.WriteString(tui.Fit(fmt.Sprintf("trapline watch  %s  (research use only; not a medical device)", time.Now().Format(time.TimeOnly)), w) + "\n\n")
	for _, l := range v.board.Render(w, v.alertFormat(w)) {
		b.WriteString(l + "\n")
	}
	if v.opts.Footer != "" {
		for _, l := range tui.Wrap(v.opts.Footer, w, 0, 0) {
			b.WriteString("\n" + l)
		}
		b.WriteString("\n")
	}
	v.write(b.String())
}

// alertFormat is the format of alert lines at width w, with wall times in
// the view's time zone.
func (v *watchView) alertFormat(w int) tui.AlertFormat {
	f := tui.NewAlertFormat(w)
	f.Loc = v.opts.Loc
	return f
}

// plainLines is the periodic block of plain output: the streams with their
// open alarms. Caller holds v.mu.
func (v *watchView) plainLines() []string { return v.board.StreamLines(v.width()) }

// summary counts the alarms seen (not the events): per condition and in
// all, raised, escalated, acknowledged, cleared and still open; the lines
// fit the width less indent.
func (v *watchView) summary(indent int) []string {
	v.mu.Lock()
	defer v.mu.Unlock()
	return tui.SummaryLines(v.board.Book, v.width()-indent)
}
