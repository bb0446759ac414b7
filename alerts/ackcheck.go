package alerts

import (
	"errors"
	"fmt"
	"strings"
	"unicode"
	"unicode/utf8"
)

// Limits of an acknowledgement request: the whole message and each field.
// An alert id is "<stream>/<condition>/<digits>" and well under 200 bytes;
// a name for who acknowledged fits in 128.
const (
	MaxAckRequestBytes = 1024
	MaxAckIDBytes      = 200
	MaxAckByBytes      = 128
)

// ErrBadAck marks an acknowledgement request that was refused before it
// reached any pipeline.
var ErrBadAck = errors.New("bad ack request")

// CheckAck validates an acknowledgement of alert id by by for stream: the
// id must be "<stream>/<condition>/<digits>" of this stream, and both
// fields within their size limits, valid UTF-8 and free of control and
// format characters (which could rewrite an operator's terminal). The
// error wraps ErrBadAck.
func CheckAck(stream, id, by string) error {
	switch {
	case len(id) == 0:
		return fmt.Errorf("%w: empty id", ErrBadAck)
	case len(id) > MaxAckIDBytes:
		return fmt.Errorf("%w: id of %d bytes (at most %d)", ErrBadAck, len(id), MaxAckIDBytes)
	case len(by) > MaxAckByBytes:
		return fmt.Errorf("%w: by of %d bytes (at most %d)", ErrBadAck, len(by), MaxAckByBytes)
	case !cleanText(id):
		return fmt.Errorf("%w: id holds control characters or invalid UTF-8", ErrBadAck)
	case !cleanText(by):
		return fmt.Errorf("%w: by holds control characters or invalid UTF-8", ErrBadAck)
	}
	parts := strings.Split(id, "/")
	if len(parts) != 3 || parts[0] == "" || parts[1] == "" || !allDigits(parts[2]) || strings.ContainsAny(id, " *>") {
		return fmt.Errorf("%w: id %q is not <stream>/<condition>/<digits>", ErrBadAck, id)
	}
	if stream != "" && parts[0] != stream {
		return fmt.Errorf("%w: id %q is not of stream %s", ErrBadAck, id, stream)
	}
	return nil
}

func allDigits(s string) bool {
	if s == "" || len(s) > 19 {
		return false
	}
	for _, c := range []byte(s) {
		if c < '0' || c > '9' {
			return false
		}
	}
	return true
}

// unsafeRune reports a rune a terminal could act on: C0 and C1 controls
// (ESC, CSI, BEL, backspace, newline) and format characters such as the
// bidirectional overrides, which reorder what is shown.
func unsafeRune(r rune) bool {
	return unicode.IsControl(r) || unicode.Is(unicode.Cf, r)
}

func cleanText(s string) bool {
	if !utf8.ValidString(s) {
		return false
	}
	return strings.IndexFunc(s, unsafeRune) < 0
}

// CleanText returns s without control and format characters, invalid
// UTF-8 turned into U+FFFD: every free-text field of an event goes out
// through it, so that no consumer's terminal can be driven by one.
func CleanText(s string) string {
	if cleanText(s) {
		return s
	}
	s = strings.ToValidUTF8(s, "\uFFFD")
	return strings.Map(func(r rune) rune {
		if unsafeRune(r) {
			return -1
		}
		return r
	}, s)
}
