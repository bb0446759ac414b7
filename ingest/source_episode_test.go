package ingest

import (
	"bytes"
	"strings"
	"testing"
	"time"

	"github.com/rs/zerolog"
)

// TestDropEpisodeWarnsOnce: drops that keep coming within the quiet period
// are one episode, one warning, and its end is logged once with the count;
// a drop after the end starts a new episode.
func TestDropEpisodeWarnsOnce(t *testing.T) {
	var buf bytes.Buffer
	log := zerolog.New(&buf)
	var ep dropEpisode
	t0 := time.Unix(0, 0)
	at := func(s float64) time.Time { return t0.Add(time.Duration(s * float64(time.Second))) }
	for i := 0; i < 451; i++ { // 451 drops over 20 s, each after the buffer emptied
		now := at(float64(i) * 20 / 451)
		ep.drop(10, now, log, "drop-newest")
		ep.check(now, log)
	}
	ep.check(at(22), log)
	if n := strings.Count(buf.String(), "sink falls behind"); n != 1 {
		t.Errorf("%d warnings for one episode, want 1:\n%s", n, buf.String())
	}
	ep.check(at(26), log)
	if n := strings.Count(buf.String(), "sink caught up"); n != 1 || !strings.Contains(buf.String(), `"dropped":4510`) {
		t.Errorf("episode end logged %d times or without the count 4510:\n%s", n, buf.String())
	}
	ep.drop(1, at(40), log, "drop-newest")
	if n := strings.Count(buf.String(), "sink falls behind"); n != 2 {
		t.Errorf("a drop after the end: %d warnings in all, want 2", n)
	}
}
