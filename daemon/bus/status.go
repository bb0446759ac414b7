package bus

import (
	"encoding/json"
	"fmt"
	"time"
)

// StreamStatus is the status heartbeat published on
// <prefix>.status.<stream>: whether the stream runs and reads, and its
// counters so far.
type StreamStatus struct {
	Type      string    `json:"type"`
	Schema    int       `json:"schema"`
	Stream    string    `json:"stream"`
	Time      time.Time `json:"time"`
	Running   bool      `json:"running"`
	Connected bool      `json:"connected"`
	Breaths   uint64    `json:"breaths"`
	Active    int64     `json:"alerts_active"`
	Restarts  uint64    `json:"restarts"`
	// Worker names the scale-out worker that analyses the stream (empty in
	// role all).
	Worker string `json:"worker,omitempty"`
}

// Marshal encodes the heartbeat as JSON.
func (st StreamStatus) Marshal() ([]byte, error) {
	b, err := json.Marshal(st)
	if err != nil {
		return nil, fmt.Errorf("encode status of %s: %w", st.Stream, err)
	}
	return b, nil
}
