package ingest

import (
	"sync"
	"sync/atomic"
	"time"

	"github.com/rs/zerolog"
)

// dropQuiet is how long a source must go without dropping before an
// overload episode counts as over: a sink that keeps falling just behind
// empties the buffer many times a second, and each of those is not a new
// episode.
const dropQuiet = 5 * time.Second

// dropEpisode turns the buffer's drops into one warning when an overload
// starts and one line, with the count, when it has been over for
// dropQuiet.
type dropEpisode struct {
	open    atomic.Bool
	mu      sync.Mutex
	dropped uint64
	last    time.Time
}

// drop records n samples dropped now; the first of an episode warns.
func (d *dropEpisode) drop(n int, now time.Time, log zerolog.Logger, policy string) {
	d.mu.Lock()
	defer d.mu.Unlock()
	if !d.open.Load() {
		d.open.Store(true)
		d.dropped = 0
		log.Warn().Str("policy", policy).Msg("sink falls behind: dropping samples until the buffer drains")
	}
	d.dropped += uint64(n)
	d.last = now
}

// check ends the episode once it has been quiet for dropQuiet; it costs
// one atomic load while no episode is open.
func (d *dropEpisode) check(now time.Time, log zerolog.Logger) {
	if !d.open.Load() {
		return
	}
	d.mu.Lock()
	defer d.mu.Unlock()
	if now.Sub(d.last) < dropQuiet {
		return
	}
	d.open.Store(false)
	log.Info().Uint64("dropped", d.dropped).Dur("quiet", dropQuiet).Msg("sink caught up: no longer dropping samples")
}
