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
	if len(m.Data) > alerts.MaxAckRequestBytes {
		s.reply(m, tok, fmt.Errorf("%w: %d bytes (at most %d)", alerts.ErrBadAck, len(m.Data), alerts.MaxAckRequestBytes))
		return
	}
	var req AckRequest
	if err := json.Unmarshal(m.Data, &req); err != nil {
		s.reply(m, tok, fmt.Errorf("bad ack request: %v (want {\"id\":\"...\",\"by\":\"...\"})", err))
		return
	}
	ctx, cancel := context.WithTimeout(context.Background(), ackTimeout)
	defer cancel()
	s.reply(m, tok, s.check(ctx, tok, req))
}

// check validates a decoded request for the stream with subject token tok
// (here) and hands it to Ack.
func (s *AckService) check(ctx context.Context, tok string, req AckRequest) error {
	if req.ID == "" {
		return errors.New("bad ack request: empty id")
	}
	// Size caps, id format, no control characters; the stream itself
	// checks that the id is its own.
	if err := alerts.CheckAck("", req.ID, req.By); err != nil {
		return err
	}
	return s.Ack(ctx, tok, req)
}

// Request acknowledges on behalf of a caller in this process (the live
// view's page) with the same checks, permissions and counting as a request
// over NATS, and returns the answer the NATS requester would get as an
// error.
func (s *AckService) Request(ctx context.Context, stream string, req AckRequest) error {
	tok := alerts.SubjectToken(stream)
	var err error
	if !s.Here(tok) {
		err = fmt.Errorf("no stream %q here", stream)
	} else {
		ctx, cancel := context.WithTimeout(ctx, ackTimeout)
		defer cancel()
		err = s.check(ctx, tok, req)
	}
	s.count(tok, err)
	return err
}

// count counts one answer by result ("ok", "error").
func (s *AckService) count(tok string, err error) {
	if s.Counted == nil {
		return
	}
	result := "ok"
	if err != nil {
		result = "error"
	}
	s.Counted(tok, result)
}

func (s *AckService) reply(m *nats.Msg, tok string, err error) {
	r := AckReply{OK: err == nil}
	if err != nil {
		r.Error = err.Error()
	}
	s.count(tok, err)
	if m.Reply == "" {
		return
	}
	b, _ := json.Marshal(r)
	if rerr := m.Respond(b); rerr != nil {
		s.Log.Warn().Err(rerr).Str("subject", m.Subject).Msg("ack reply failed")
	}
}
