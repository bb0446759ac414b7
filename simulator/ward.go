package simulator

import (
	"context"
	"errors"
	"fmt"
	"io"

	"trapline/ingest"
)

// WardOptions configure StreamWard.
type WardOptions struct {
	// Format is ingest.FormatText (the default; every line then carries
	// the stream column) or ingest.FormatBinary (every frame names its
	// stream and its own patient's sample rate, with device time).
	Format ingest.Format
	// Decimals is the number of text digits after the decimal point; 0
	// writes the shortest text that reads back to the identical float64.
	Decimals int
	// Speed is simulated seconds per wall-clock second, as for Stream: 1 is
	// real time, 0 or +Inf as fast as the output takes it.
	Speed float64
	// Truth, when set, receives the ground truth of every completed breath
	// of every patient as one JSON object per line; each names its stream.
	Truth io.Writer
	// OnTruth, when set, is called with every completed breath.
	OnTruth func(Truth)
	// OnLink, when set, is called at every scripted disconnection and
	// reconnection of a patient. The shared link stays up: the patient's
	// samples stop and come back, so its stream shows a gap.
	OnLink func(stream string, ev LinkEvent)
}

// StreamWard runs several simulated patients together and writes their
// samples to one output, interleaved in time order, each line or frame
// naming its patient's stream: the load of a ward of beds on one link, for
// load tests and demonstrations of a multiplexed source. Samples of equal
// time go in the order of sims, so the output is a deterministic function
// of the scenarios. Pacing, cancellation and the ground truth are as for
// Stream; the stream ids must be distinct. StreamWard closes out before it
// returns.
func StreamWard(ctx context.Context, sims []*Sim, out Output, opts WardOptions) (StreamStats, error) {
	enc, err := newWardEncoder(sims, opts)
	if err != nil {
		return StreamStats{}, err
	}
	w, err := newPacedWriter(ctx, out, enc, opts.Speed, opts.Truth, opts.OnTruth)
	if err != nil {
		return StreamStats{}, err
	}
	defer w.close()
	if err := w.open(); err != nil {
		return w.st, err
	}
	next := make([]ingest.Sample, len(sims))
	h := wardHeap{times: make([]float64, len(sims))}
	pull := func(i int) error {
		smp, ok := sims[i].Next()
		for _, ev := range sims[i].TakeLinkEvents() {
			if opts.OnLink != nil {
				opts.OnLink(sims[i].Stream(), ev)
			}
		}
		if err := w.truth(sims[i]); err != nil {
			return err
		}
		if ok {
			next[i] = smp
			h.push(i, smp.TimeS)
		}
		return nil
	}
	for i := range sims {
		if err := pull(i); err != nil {
			return w.st, err
		}
	}
	for h.len() > 0 {
		i := h.pop()
		if err := w.sample(sims[i].Stream(), next[i]); err != nil {
			return w.st, err
		}
		if err := pull(i); err != nil {
			return w.st, err
		}
	}
	return w.st, w.finish()
}

// newWardEncoder checks the patients' stream ids and returns the encoder
// of the ward's output.
func newWardEncoder(sims []*Sim, opts WardOptions) (ingest.Encoder, error) {
	if len(sims) == 0 {
		return nil, errors.New("ward: no patients")
	}
	seen := make(map[string]bool, len(sims))
	for _, s := range sims {
		id := s.Stream()
		if !ingest.ValidStreamID(id) {
			return nil, fmt.Errorf("ward: stream id %q: want 1 to 32 letters, digits, '-' or '_'", id)
		}
		if seen[id] {
			return nil, fmt.Errorf("ward: stream id %q given to two patients", id)
		}
		seen[id] = true
	}
	switch opts.Format {
	case ingest.FormatText, "":
		enc, err := ingest.NewTextEncoder(ingest.TextEncoderOptions{Decimals: opts.Decimals, Stream: true})
		if err != nil {
			return nil, fmt.Errorf("ward: %w", err)
		}
		return enc, nil
	case ingest.FormatBinary:
		be := &byStreamEncoder{encs: make(map[string]ingest.Encoder, len(sims))}
		for _, s := range sims {
			enc, err := ingest.NewBinaryEncoder(ingest.BinaryEncoderOptions{RateHz: s.SampleRateHz(), Time: true})
			if err != nil {
				return nil, fmt.Errorf("ward: stream %s: %w", s.Stream(), err)
			}
			be.encs[s.Stream()] = enc
		}
		return be, nil
	}
	return nil, fmt.Errorf("ward: format %q: want text or binary", opts.Format)
}

// byStreamEncoder writes each stream with an encoder of its own (binary
// frames that declare each patient's sample rate); it has no header.
type byStreamEncoder struct {
	encs map[string]ingest.Encoder
}

func (e *byStreamEncoder) Header() []byte { return nil }

func (e *byStreamEncoder) Append(dst []byte, stream string, s ingest.Sample) []byte {
	return e.encs[stream].Append(dst, stream, s)
}

// wardHeap is a binary min-heap of patient indexes keyed by the time of
// their next sample; equal times come out lowest index first.
type wardHeap struct {
	idx   []int
	times []float64 // by patient index
}

func (h *wardHeap) len() int { return len(h.idx) }

func (h *wardHeap) less(a, b int) bool {
	ia, ib := h.idx[a], h.idx[b]
	ta, tb := h.times[ia], h.times[ib]
	return ta < tb || ta == tb && ia < ib
}

func (h *wardHeap) push(i int, tS float64) {
	h.times[i] = tS
	h.idx = append(h.idx, i)
	for c := len(h.idx) - 1; c > 0; {
		p := (c - 1) / 2
		if !h.less(c, p) {
			break
		}
		h.idx[c], h.idx[p] = h.idx[p], h.idx[c]
		c = p
	}
}

func (h *wardHeap) pop() int {
	top := h.idx[0]
	last := len(h.idx) - 1
	h.idx[0] = h.idx[last]
	h.idx = h.idx[:last]
	for p := 0; ; {
		c := 2*p + 1
		if c >= last {
			break
		}
		if c+1 < last && h.less(c+1, c) {
			c++
		}
		if !h.less(c, p) {
			break
		}
		h.idx[c], h.idx[p] = h.idx[p], h.idx[c]
		p = c
	}
	return top
}

// WardScenarios makes n patients from a list of scenarios, taken in turn:
// patient i runs scenarios[i mod len] under the stream id prefix-(i+1)
// (prefix "bed" when empty) with its sensor seed moved by i, so that
// patients of the same scenario do not carry the same noise.
func WardScenarios(scenarios []Scenario, n int, prefix string) ([]Scenario, error) {
	if len(scenarios) == 0 || n <= 0 {
		return nil, fmt.Errorf("ward: want at least one scenario and one patient, got %d and %d", len(scenarios), n)
	}
	if prefix == "" {
		prefix = "bed"
	}
	out := make([]Scenario, n)
	for i := range out {
		sc := scenarios[i%len(scenarios)]
		sc.Stream = fmt.Sprintf("%s-%d", prefix, i+1)
		if !ingest.ValidStreamID(sc.Stream) {
			return nil, fmt.Errorf("ward: stream id %q: want 1 to 32 letters, digits, '-' or '_'", sc.Stream)
		}
		sc.Seed += uint64(i)
		out[i] = sc
	}
	return out, nil
}
