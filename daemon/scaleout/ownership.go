package scaleout

import (
	"context"
	"time"
)

// assign starts and stops the partition runners as the live members change.
func (w *worker) assign(ctx context.Context, changed <-chan []string) error {
	type runner struct {
		stop context.CancelFunc
		done chan struct{}
	}
	running := map[int]*runner{}
	defer func() {
		for _, r := range running {
			r.stop()
		}
		for _, r := range running {
			<-r.done
		}
	}()
	for {
		var live []string
		select {
		case <-ctx.Done():
			return nil
		case live = <-changed:
		}
		want := map[int]bool{}
		for _, p := range ownedPartitions(w.id, live, w.cfg.ScaleOut.Partitions) {
			want[p] = true
		}
		var lost, gained []int
		// Runners stop in parallel: each writes its last checkpoint.
		for p, r := range running {
			if !want[p] {
				r.stop()
				lost = append(lost, p)
			}
		}
		for _, p := range lost {
			<-running[p].done
			delete(running, p)
		}
		for p := range want {
			if running[p] != nil {
				continue
			}
			pctx, stop := context.WithCancel(ctx)
			r := &runner{stop: stop, done: make(chan struct{})}
			running[p] = r
			gained = append(gained, p)
			go func() {
				defer close(r.done)
				w.supervisePartition(pctx, p)
			}()
		}
		if len(lost)+len(gained) > 0 {
			w.log.Info().Ints("gained", gained).Ints("lost", lost).Int("owned", len(running)).Msg("partitions reassigned")
		}
	}
}

// supervisePartition runs a partition until ctx ends, starting it again
// after a failure (or after being fenced out while this worker still
// believes it owns the partition, which lasts until the views agree).
func (w *worker) supervisePartition(ctx context.Context, p int) {
	log := w.log.With().Int("partition", p).Logger()
	wait := time.Duration(0)
	for {
		began := time.Now()
		err := w.host.Protect(ctx, func(ctx context.Context) error { return w.runPartition(ctx, p, log) })
		if ctx.Err() != nil {
			return
		}
		if time.Since(began) > healthyRun {
			wait = 0 // a run that went well starts the backoff afresh
		}
		wait = min(max(2*wait, 250*time.Millisecond), 5*time.Second)
		log.Warn().Err(err).Dur("restart_in", wait).Msg("partition stopped")
		t := time.NewTimer(wait)
		select {
		case <-ctx.Done():
			t.Stop()
			return
		case <-t.C:
		}
	}
}

// healthyRun is how long a partition runner must have run for its failure
// to count as a new episode rather than one more of a run of failures.
const healthyRun = 10 * time.Second
