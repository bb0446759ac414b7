package bus

import (
	"context"
	"errors"
	"strings"
	"testing"

	"github.com/rs/zerolog"

	"trapline/alerts"
)

// Request (the live view's way in) applies the checks of a NATS request
// and counts its answers the same way.
func TestAckServiceRequest(t *testing.T) {
	var got []AckRequest
	counted := map[string]int{}
	refuse := errors.New("not the current id")
	s := &AckService{
		Here: func(tok string) bool { return tok == alerts.SubjectToken("bed-7") },
		Ack: func(_ context.Context, tok string, req AckRequest) error {
			got = append(got, req)
			if req.ID != "bed-7/air-trapping/2" {
				return refuse
			}
			return nil
		},
		Counted: func(tok, result string) { counted[tok+" "+result]++ },
		Log:     zerolog.Nop(),
	}
	for _, tc := range []struct {
		stream, id, wantErr string
	}{
		{"bed-9", "bed-9/air-trapping/1", `no stream "bed-9" here`},
		{"bed-7", "", "empty id"},
		{"bed-7", "bed-7/air-trapping/1", "not the current id"},
		{"bed-7", "bed-7/air-trapping/2", ""},
	} {
		err := s.Request(t.Context(), tc.stream, AckRequest{ID: tc.id, By: "nurse"})
		if (err == nil) != (tc.wantErr == "") || err != nil && !strings.Contains(err.Error(), tc.wantErr) {
			t.Errorf("Request(%s, %q) = %v, want an error containing %q", tc.stream, tc.id, err, tc.wantErr)
		}
	}
	if len(got) != 2 || got[1].By != "nurse" {
		t.Errorf("Ack called with %+v, want the two requests that passed the checks", got)
	}
	if counted["bed-7 ok"] != 1 || counted["bed-7 error"] != 2 || counted["bed-9 error"] != 1 {
		t.Errorf("counted %v", counted)
	}
}
