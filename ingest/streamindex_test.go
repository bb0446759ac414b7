package ingest

import (
	"fmt"
	"math/rand/v2"
	"testing"
)

// TestStreamIndexAgainstMap asks a StreamIndex and a map for the same
// streams, in a repeating order with now and then another stream and new
// ones, and checks that both give the same value.
func TestStreamIndexAgainstMap(t *testing.T) {
	r := rand.New(rand.NewPCG(4, 4))
	var x StreamIndex[int]
	m := map[string]int{}
	ids := make([]string, 30)
	for i := range ids {
		ids[i] = fmt.Sprintf("bed-%d", i)
	}
	for i := range 20000 {
		id := ids[i%len(ids)]
		if r.IntN(10) == 0 {
			id = ids[r.IntN(len(ids))]
		}
		if r.IntN(500) == 0 {
			id = fmt.Sprintf("new-%d", i)
		}
		got, ok := x.Get(id)
		want, wantOK := m[id]
		if ok != wantOK || got != want {
			t.Fatalf("sample %d, %s: index %d %v, map %d %v", i, id, got, ok, want, wantOK)
		}
		if !ok {
			x.Put(id, i)
			m[id] = i
		}
	}
	for id, want := range m {
		if got, ok := x.Get(id); !ok || got != want {
			t.Fatalf("%s: index %d %v at the end, map %d", id, got, ok, want)
		}
	}
}
