package cli

import (
	"context"
	"encoding/json"
	"fmt"
	"io"
	"math"
	"os"
	"sort"
	"strings"
	"sync"
	"time"

	"github.com/mattn/go-isatty"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"
	"github.com/rs/zerolog"
	"golang.org/x/term"

	"trapline/alerts"
	"trapline/analyze"
	"trapline/daemon/bus"
)

// logFunc starts a log event; zerolog's Logger.Warn has this shape.
type logFunc = func() *zerolog.Event

// watchView is the state behind the live view: the latest breath and the
// active alarms of every stream, and the log of alert events. It is safe
// for concurrent use by the NATS callbacks and the render loop.
type watchView struct {
	opts     watchOptions
	out      io.Writer
	terminal bool
	width    func() int

	mu      sync.Mutex
	streams map[string]*streamView
	log     []string
	seen    map[string]bool // alert DedupIDs, so a replayed event is shown once
	tally   map[string]map[alerts.State]int
	dirty   bool
	err     error
}

type streamView struct {
	breath    analyze.Breath
	hasBreath bool
	status    *bus.StreamStatus
	active    map[string]alerts.Event
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
	v := &watchView{
		opts:    opts,
		out:     out,
		streams: map[string]*streamView{},
		seen:    map[string]bool{},
		tally:   map[string]map[alerts.State]int{},
		width:   func() int { return 120 },
	}
	if f, ok := out.(*os.File); ok && !opts.JSON && !opts.Plain && isatty.IsTerminal(f.Fd()) {
		v.terminal = true
		v.width = func() int {
			if w, _, err := term.GetSize(int(f.Fd())); err == nil && w > 20 {
				return w
			}
			return 80
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

func (v *watchView) stream(id string) *streamView {
	s := v.streams[id]
	if s == nil {
		s = &streamView{active: map[string]alerts.Event{}}
		v.streams[id] = s
	}
	return s
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
		s := v.stream(b.Stream)
		s.breath, s.hasBreath = b, true
	case "status":
		var st bus.StreamStatus
		if err := json.Unmarshal(data, &st); err != nil || !v.wanted(st.Stream) {
			return
		}
		v.stream(st.Stream).status = &st
	case "alert":
		var ev alerts.Event
		if err := json.Unmarshal(data, &ev); err != nil || !v.wanted(ev.Stream) {
			return
		}
		if v.seen[ev.DedupID()] {
			return
		}
		v.seen[ev.DedupID()] = true
		s := v.stream(ev.Stream)
		if ev.Supersedes != "" {
			delete(s.active, ev.Supersedes)
		}
		if ev.State.Terminal() {
			delete(s.active, ev.ID)
		} else {
			s.active[ev.ID] = ev
		}
		if v.tally[ev.Condition] == nil {
			v.tally[ev.Condition] = map[alerts.State]int{}
		}
		v.tally[ev.Condition][ev.State]++
		line := alertLine(&ev)
		v.log = append(v.log, line)
		if len(v.log) > maxLogLines {
			v.log = v.log[len(v.log)-maxLogLines:]
		}
		if !v.opts.JSON && !v.terminal {
			v.write(line + "\n")
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
			for _, l := range v.streamLines() {
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

// redraw paints the whole terminal view: a title, one line per stream, the
// alert log. Caller holds v.mu.
func (v *watchView) redraw() {
	w := v.width()
	var b strings.Builder
	b.WriteString("\x1b[H\x1b[2J")
	b.WriteString(clip(fmt.Sprintf("trapline watch  %s  (research use only; not a medical device)", time.Now().Format(time.TimeOnly)), w) + "\n\n")
	ids := v.streamIDs()
	if len(ids) == 0 {
		b.WriteString("waiting for breaths...\n")
	}
	for _, id := range ids {
		s := v.streams[id]
		b.WriteString(clip(streamFigures(id, s), w) + "\n")
		b.WriteString(clip("           "+streamAlarms(s), w) + "\n")
	}
	b.WriteString("\nalert events:\n")
	for _, l := range v.log {
		b.WriteString(clip(l, w) + "\n")
	}
	if v.opts.Footer != "" {
		b.WriteString("\n" + v.opts.Footer + "\n")
	}
	v.write(b.String())
}

// streamIDs returns the ids of the streams seen, sorted. Caller holds v.mu.
func (v *watchView) streamIDs() []string {
	ids := make([]string, 0, len(v.streams))
	for id := range v.streams {
		ids = append(ids, id)
	}
	sort.Strings(ids)
	return ids
}

// streamLines renders one line per stream, sorted by id. Caller holds v.mu.
func (v *watchView) streamLines() []string {
	ids := v.streamIDs()
	out := make([]string, 0, len(ids))
	for _, id := range ids {
		out = append(out, streamLine(id, v.streams[id]))
	}
	return out
}

// streamLine is one stream's figures and active alarms on one line.
func streamLine(id string, s *streamView) string {
	return streamFigures(id, s) + "  | " + streamAlarms(s)
}

// streamFigures is the stream's latest breath, with "-" for a value the
// analysis could not give.
func streamFigures(id string, s *streamView) string {
	var b strings.Builder
	fmt.Fprintf(&b, "%-10s", id)
	if s.status != nil && !s.status.Connected {
		b.WriteString(" [no signal]")
	}
	if !s.hasBreath {
		b.WriteString(" no breath yet")
		return b.String()
	}
	br := &s.breath
	fmt.Fprintf(&b, " #%-5d RR %s  VTe %s mL  PIP %s  PEEP %s  PEEPi %s  trapped %s mL  EEF %s L/min  Te/tau %s",
		br.Seq, num(br.RateBPM, 0), num(br.VteML, 0), num(br.PeakCmH2O, 1), num(br.PEEPCmH2O, 1),
		num(br.PEEPiCmH2O, 1), num(br.TrappedML, 0), num(br.EndExpFlowLPM, 1), num(br.TeOverTau, 2))
	return b.String()
}

// streamAlarms lists the stream's active alarms with their priority.
func streamAlarms(s *streamView) string {
	if len(s.active) == 0 {
		return "no alerts"
	}
	act := make([]string, 0, len(s.active))
	for _, ev := range s.active {
		tag := ev.Condition + "(" + string(ev.Priority)
		if ev.State == alerts.Acknowledged {
			tag += ",ack"
		}
		act = append(act, tag+")")
	}
	sort.Strings(act)
	return "ALERTS: " + strings.Join(act, " ")
}

// alertLine is one entry of the alert log.
func alertLine(ev *alerts.Event) string {
	ts := ev.Time.Local().Format(time.TimeOnly)
	if ev.Time.IsZero() {
		ts = "--:--:--"
	}
	return fmt.Sprintf("%s %-10s %-12s %-22s %-6s %s [%s]", ts, ev.Stream, strings.ToUpper(string(ev.State)),
		ev.Condition, ev.Priority, ev.Message, ev.ID)
}

// summary returns, per condition, how many alarms were raised and cleared
// (and escalated or acknowledged), sorted by condition.
func (v *watchView) summary() []string {
	v.mu.Lock()
	defer v.mu.Unlock()
	conds := make([]string, 0, len(v.tally))
	for c := range v.tally {
		conds = append(conds, c)
	}
	sort.Strings(conds)
	var out []string
	for _, c := range conds {
		t := v.tally[c]
		out = append(out, fmt.Sprintf("%-24s raised %d, escalated %d, acknowledged %d, cleared %d",
			c, t[alerts.Raised], t[alerts.Escalated], t[alerts.Acknowledged], t[alerts.Cleared]))
	}
	return out
}

// num formats v with the given decimals, or "-" when unknown.
func num(v float64, prec int) string {
	if math.IsNaN(v) || math.IsInf(v, 0) {
		return "-"
	}
	return fmt.Sprintf("%.*f", prec, v)
}

// clip cuts s to w runes so that a redraw never wraps.
func clip(s string, w int) string {
	r := []rune(s)
	if len(r) <= w {
		return s
	}
	return string(r[:w])
}
