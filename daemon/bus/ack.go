package bus

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"trapline/alerts"
)

// AckRequest is the body of an acknowledgement request on
// <prefix>.ack.<stream>.
type AckRequest struct {
	ID string `json:"id"`
	By string `json:"by"`
	// Why is the reason given with the acknowledgement (optional); the
	// daemon logs it.
	Why string `json:"why,omitempty"`
}

// AckReply is the answer to an acknowledgement request.
type AckReply struct {
	OK    bool   `json:"ok"`
	Error string `json:"error,omitempty"`
}

// ackTimeout bounds how long a request waits for the stream's analysis.
const ackTimeout = 5 * time.Second

// AckService answers acknowledgement requests: {"id":"...","by":"..."} →
// {"ok":true} or {"ok":false,"error":"..."}. The acknowledged event itself
// goes out on the alert subject like every other state change. The daemon
// and the scale-out worker both serve acknowledgements with it.
type AckService struct {
	// Here reports whether the stream with subject token tok is analysed
	// by this process.
	Here func(tok string) bool
	// Ack hands a request to that stream's analysis and returns its answer.
	Ack func(ctx context.Context, tok string, req AckRequest) error
	// Silent leaves requests for streams that are not here unanswered: in
	// the scale-out every worker hears them and only the owner answers.
	Silent bool
	// Counted, when set, counts every answer by result ("ok", "error").
	Counted func(tok, result string)
	Log     zerolog.Logger
}

// Subscribe serves the acknowledgement subjects of every stream under subj.
func (s *AckService) Subscribe(nc *nats.Conn, subj alerts.Subjects) (*nats.Subscription, error) {
	return nc.Subscribe(subj.All(alerts.KindAck), s.handle)
}

func (s *AckService) handle(m *nats.Msg) {
	tok := m.Subject[strings.LastIndexByte(m.Subject, '.')+1:]
	if !s.Here(tok) {
		if !s.Silent {
			s.reply(m, tok, fmt.Errorf("no stream %q here", tok))
		}
		return
	}
	var req AckRequest
	if err := json.Unmarshal(m.Data, &req); err != nil {
		s.reply(m, tok, fmt.Errorf("bad ack request: %v (want {\"id\":\"...\",\"by\":\"...\"})", err))
		return
	}
	if req.ID == "" {
		s.reply(m, tok, errors.New("bad ack request: empty id"))
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), ackTimeout)
	defer cancel()
	s.reply(m, tok, s.Ack(ctx, tok, req))
}

func (s *AckService) reply(m *nats.Msg, tok string, err error) {
	r := AckReply{OK: err == nil}
	result := "ok"
	if err != nil {
		r.Error, result = err.Error(), "error"
	}
	if s.Counted != nil {
		s.Counted(tok, result)
	}
	if m.Reply == "" {
		return
	}
	b, _ := json.Marshal(r)
	if rerr := m.Respond(b); rerr != nil {
		s.Log.Warn().Err(rerr).Str("subject", m.Subject).Msg("ack reply failed")
	}
}
