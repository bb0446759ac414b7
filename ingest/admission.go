package ingest

import (
	"errors"
	"fmt"
	"path"
	"sync"
	"sync/atomic"
)

// StreamTemplate admits the stream ids of a multiplexed source by pattern or
// by list, so that a ward of beds on one link needs one entry in the
// configuration rather than one per bed. The template's name also selects
// the settings (detectors, alarms) that its streams run with.
type StreamTemplate struct {
	// Name identifies the template in logs, metrics and the configuration.
	Name string
	// Pattern is a glob over the whole id with the syntax of path.Match:
	// '*' matches any run of characters, '?' one character, "[a-c]" and
	// "[^x]" a class; "bed-*" admits bed-1, bed-12 and bed-icu. Empty
	// leaves the template to its Allow list.
	Pattern string
	// Allow lists ids admitted one by one.
	Allow []string
}

// matches reports whether the template admits id.
func (t *StreamTemplate) matches(id string) bool {
	for _, a := range t.Allow {
		if a == id {
			return true
		}
	}
	if t.Pattern == "" {
		return false
	}
	ok, _ := path.Match(t.Pattern, id) // the pattern was checked by NewAdmission
	return ok
}

// AdmissionPolicy says which stream ids one source may carry.
type AdmissionPolicy struct {
	// Templates are tried in order; the first that admits an id is its
	// template. Without templates every valid id is admitted.
	Templates []StreamTemplate
	// MaxStreams is the most distinct ids one source admits; further ids
	// are refused until one is released. 0 means no limit of its own (a
	// decoder still tells at most 1024 ids apart).
	MaxStreams int
}

// The reasons for refusing a stream id.
var (
	// ErrNoTemplate refuses an id that no template admits.
	ErrNoTemplate = errors.New("no stream template admits the id")
	// ErrTooManyStreams refuses a new id of a source that already carries
	// its maximum number of streams.
	ErrTooManyStreams = errors.New("source carries its maximum number of streams")
)

// AdmissionStats counts what an Admission decided.
type AdmissionStats struct {
	Admitted       int    // ids admitted now
	RefusedIDs     uint64 // refusals of an id (each id counted once while it is remembered)
	RefusedSamples uint64 // samples of refused ids, as counted with CountRefused
}

// rememberRefused bounds the set of refused ids remembered, so that a
// sender of ever new ids cannot grow it without limit; beyond it every
// refusal counts.
const rememberRefused = 1024

// Admission applies an AdmissionPolicy to the ids of one source. Admit is
// meant to be called once per new id (a Router remembers its decisions),
// so a mutex is cheap; Stats and CountRefused may be called from any
// goroutine.
type Admission struct {
	policy   AdmissionPolicy
	mu       sync.Mutex
	admitted map[string]int // id → template index (-1 without templates)
	refused  map[string]struct{}
	nRefused atomic.Uint64
	samples  atomic.Uint64
	nAdmit   atomic.Int64
}

// NewAdmission checks a policy: valid patterns and listed ids, a
// non-negative maximum.
func NewAdmission(p AdmissionPolicy) (*Admission, error) {
	if p.MaxStreams < 0 {
		return nil, fmt.Errorf("max streams %d: want 0 (no limit) or more", p.MaxStreams)
	}
	for i, t := range p.Templates {
		if t.Pattern == "" && len(t.Allow) == 0 {
			return nil, fmt.Errorf("stream template %d (%q): want a pattern or a list of ids", i, t.Name)
		}
		if _, err := path.Match(t.Pattern, ""); err != nil {
			return nil, fmt.Errorf("stream template %d (%q): pattern %q: %w", i, t.Name, t.Pattern, err)
		}
		for _, id := range t.Allow {
			if !ValidStreamID(id) {
				return nil, fmt.Errorf("stream template %d (%q): id %q: want 1 to %d letters, digits, '-' or '_'",
					i, t.Name, id, maxStreamID)
			}
		}
	}
	p.Templates = append([]StreamTemplate(nil), p.Templates...)
	return &Admission{policy: p, admitted: map[string]int{}, refused: map[string]struct{}{}}, nil
}

// Admit decides about id: the index of the template that admits it (-1
// when the policy has no templates), or ErrNoTemplate or ErrTooManyStreams.
// An admitted id stays admitted, with the same template, until Release.
func (a *Admission) Admit(id string) (template int, err error) {
	a.mu.Lock()
	defer a.mu.Unlock()
	if t, ok := a.admitted[id]; ok {
		return t, nil
	}
	t, err := a.decide(id)
	if err != nil {
		if _, seen := a.refused[id]; !seen {
			if len(a.refused) < rememberRefused {
				a.refused[id] = struct{}{}
			}
			a.nRefused.Add(1)
		}
		return -1, err
	}
	a.admitted[id] = t
	a.nAdmit.Store(int64(len(a.admitted)))
	delete(a.refused, id)
	return t, nil
}

func (a *Admission) decide(id string) (int, error) {
	if !ValidStreamID(id) {
		return -1, fmt.Errorf("stream id %q: not valid", id)
	}
	t := -1
	if len(a.policy.Templates) > 0 {
		for i := range a.policy.Templates {
			if a.policy.Templates[i].matches(id) {
				t = i
				break
			}
		}
		if t < 0 {
			return -1, ErrNoTemplate
		}
	}
	if a.policy.MaxStreams > 0 && len(a.admitted) >= a.policy.MaxStreams {
		return -1, ErrTooManyStreams
	}
	return t, nil
}

// Release frees the place of an admitted id (a stream that was retired),
// so that another id may take it.
func (a *Admission) Release(id string) {
	a.mu.Lock()
	defer a.mu.Unlock()
	delete(a.admitted, id)
	a.nAdmit.Store(int64(len(a.admitted)))
}

// Template returns the template at index i of the policy (from Admit).
func (a *Admission) Template(i int) StreamTemplate { return a.policy.Templates[i] }

// CountRefused adds n samples of refused ids to the counters.
func (a *Admission) CountRefused(n int) { a.samples.Add(uint64(n)) }

// Stats returns the counters so far.
func (a *Admission) Stats() AdmissionStats {
	return AdmissionStats{Admitted: int(a.nAdmit.Load()), RefusedIDs: a.nRefused.Load(), RefusedSamples: a.samples.Load()}
}

// Router delivers the batches of one decoder stream by stream, admitting
// each new stream once. It is the reading goroutine's dispatcher: Route
// splits a batch with a Demux, asks the Admission about an index it has not
// seen, and calls deliver once per admitted stream; the samples of refused
// streams are counted and dropped. A Router belongs to one BatchDecoder
// (its decisions are kept by stream index) and is not safe for concurrent
// use; several Routers may share one Admission.
type Router struct {
	demux    Demux
	adm      *Admission
	template []int32 // per stream index: 0 undecided, 1 refused, else the template index + 3
}

// NewRouter returns a router that admits streams with adm; nil admits all.
func NewRouter(adm *Admission) *Router { return &Router{adm: adm} }

// Route splits b and calls deliver with the span of every admitted stream
// and its template index (-1 without templates). It returns the number of
// samples refused.
func (r *Router) Route(b *Batch, deliver func(sp Span, template int)) (refused int) {
	for _, sp := range r.demux.Split(b) {
		for int(sp.Index) >= len(r.template) {
			r.template = append(r.template, 0)
		}
		d := r.template[sp.Index]
		if d == 0 {
			d = 1 // refused
			if r.adm == nil {
				d = -1 + 3 // admitted, no template
			} else if t, err := r.adm.Admit(sp.Stream); err == nil {
				d = int32(t) + 3
			}
			r.template[sp.Index] = d
		}
		if d == 1 {
			refused += len(sp.Samples)
			continue
		}
		deliver(sp, int(d)-3)
	}
	if refused > 0 && r.adm != nil {
		r.adm.CountRefused(refused)
	}
	return refused
}

// Forget drops the router's decision about a stream index (after the
// Admission released it, or to ask again after the policy's limit was
// reached), so that the next batch of that stream is decided anew.
func (r *Router) Forget(index int32) {
	if int(index) < len(r.template) {
		r.template[index] = 0
	}
}
