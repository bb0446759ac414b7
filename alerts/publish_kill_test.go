//go:build unix

package alerts

import (
	"bufio"
	"cmp"
	"context"
	"fmt"
	"os"
	"os/exec"
	"slices"
	"strconv"
	"strings"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
)

// childEnv switches the test binary into the publishing child of
// TestPublisherSurvivesSIGKILL.
const childEnv = "TRAPLINE_ALERTS_PUBLISH_CHILD"

// TestMain lets the test binary run as the publishing child process.
func TestMain(m *testing.M) {
	if arg := os.Getenv(childEnv); arg != "" {
		os.Exit(publishChild(arg))
	}
	os.Exit(m.Run())
}

// publishChild is a publisher process: it raises events numbered from
// first, count of them, printing "spooled N" once Publish has returned for
// event N, then "drained" when its spool is empty. It exits by itself after
// 30 s at most; the parent usually kills it first.
func publishChild(arg string) int {
	parts := strings.Split(arg, "|")
	if len(parts) != 4 {
		fmt.Fprintln(os.Stderr, "bad child argument", arg)
		return 3
	}
	first, _ := strconv.Atoi(parts[2])
	count, _ := strconv.Atoi(parts[3])
	ctx, cancel := context.WithTimeout(context.Background(), 30*time.Second)
	defer cancel()
	nc, err := nats.Connect(parts[0], nats.MaxReconnects(-1), nats.RetryOnFailedConnect(true),
		nats.ReconnectWait(50*time.Millisecond), nats.ReconnectJitter(0, 0))
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 3
	}
	sp, err := OpenSpool(parts[1], 0)
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 3
	}
	p, err := NewPublisher(nc, sp, PublisherOptions{Streams: testStreams(""),
		RequestTimeout: 300 * time.Millisecond, RetryMin: 20 * time.Millisecond, RetryMax: 200 * time.Millisecond,
		Interval: 200 * time.Millisecond})
	if err != nil {
		fmt.Fprintln(os.Stderr, err)
		return 3
	}
	go func() { _ = p.Run(ctx) }()
	for i := first; i < first+count && ctx.Err() == nil; i++ {
		if err := p.Publish(context.Background(), testEvent("bed-k", i, Raised)); err != nil {
			fmt.Fprintln(os.Stderr, err)
			return 3
		}
		fmt.Printf("spooled %d\n", i)
		time.Sleep(5 * time.Millisecond)
	}
	for ctx.Err() == nil && p.Depth() > 0 {
		time.Sleep(20 * time.Millisecond)
	}
	if p.Depth() > 0 {
		return 4
	}
	fmt.Println("drained")
	_ = p.Close()
	return 0
}

// child is a running publishing child and what it reported.
type child struct {
	cmd   *exec.Cmd
	lines chan string
}

func startChild(t *testing.T, url, dir string, first, count int) *child {
	t.Helper()
	cmd := exec.Command(os.Args[0], "-test.run=^$")
	cmd.Env = append(os.Environ(), fmt.Sprintf("%s=%s|%s|%d|%d", childEnv, url, dir, first, count))
	cmd.Stderr = os.Stderr
	out, err := cmd.StdoutPipe()
	if err != nil {
		t.Fatal(err)
	}
	if err := cmd.Start(); err != nil {
		t.Fatal(err)
	}
	c := &child{cmd: cmd, lines: make(chan string, 1<<16)}
	go func() {
		sc := bufio.NewScanner(out)
		for sc.Scan() {
			c.lines <- sc.Text()
		}
		close(c.lines)
	}()
	t.Cleanup(func() { _ = cmd.Process.Kill(); _ = cmd.Wait() })
	return c
}

// await reads the child's lines until n more events are spooled (or, for
// n == 0, until it reports "drained"), bounded by limit; it appends the
// spooled ids to ids.
func (c *child) await(t *testing.T, n int, limit time.Duration, ids *[]string) {
	t.Helper()
	timeout := time.After(limit)
	for got := 0; n == 0 || got < n; {
		select {
		case line, ok := <-c.lines:
			if !ok {
				t.Fatalf("child ended early")
			}
			if line == "drained" {
				return
			}
			i, err := strconv.Atoi(strings.TrimPrefix(line, "spooled "))
			if err != nil {
				t.Fatalf("child said %q", line)
			}
			*ids = append(*ids, killID(i))
			got++
		case <-timeout:
			t.Fatalf("child: timed out after %v", limit)
		}
	}
}

// TestPublisherSurvivesSIGKILL kills a publishing process hard and starts
// another on the same spool: every event the first one reported as spooled
// reaches the stream exactly once, in order. Killed during an outage, the
// events wait in the spool; killed while publishing at full speed, an event
// may have been stored without being removed from the spool.
func TestPublisherSurvivesSIGKILL(t *testing.T) {
	for _, tc := range []struct {
		name   string
		outage bool
		rounds int
	}{
		{"during an outage", true, 1},
		{"while publishing", false, 5},
	} {
		t.Run(tc.name, func(t *testing.T) {
			ns, nc, cfg := startWithStreams(t)
			dir := t.TempDir()

			var spooled []string
			for round := range tc.rounds {
				a := startChild(t, ns.url(), dir, round*10_000, 10_000)
				a.await(t, 40, 20*time.Second, &spooled) // publishing while the server is up
				if tc.outage {
					ns.stop()
				}
				a.await(t, 30, 20*time.Second, &spooled)
				if err := a.cmd.Process.Signal(syscall.SIGKILL); err != nil {
					t.Fatal(err)
				}
				_ = a.cmd.Wait()
				// Lines already written by the child before it died.
				for line := range a.lines {
					if i, err := strconv.Atoi(strings.TrimPrefix(line, "spooled ")); err == nil {
						spooled = append(spooled, killID(i))
					}
				}
				if tc.outage {
					ns.start()
				}
			}

			b := startChild(t, ns.url(), dir, 1_000_000, 20)
			var later []string
			b.await(t, 20, 20*time.Second, &later)
			b.await(t, 0, 20*time.Second, &later)
			if err := b.cmd.Wait(); err != nil {
				t.Fatalf("second child: %v", err)
			}

			got := storedAlerts(t, nc, cfg)
			// A killed child may have spooled one event it had no time to
			// report; it must be stored at most once like every other, in
			// its place.
			reported := map[string]bool{}
			for _, id := range append(spooled, later...) {
				reported[id] = true
			}
			var want []string
			for _, id := range got {
				if !reported[id] {
					t.Logf("event spooled but not reported before a kill: %s", id)
					want = append(want, id)
					reported[id] = true
				}
			}
			want = append(want, spooled...)
			want = append(want, later...)
			slices.SortStableFunc(want, func(a, b string) int { return cmp.Compare(killSeq(a), killSeq(b)) })
			checkExactlyOnce(t, got, want)
			t.Logf("%d events across the kill, %d stored", len(want), len(got))
		})
	}
}

// killSeq returns the number n of an id "bed-k/air-trapping/n#raised".
func killSeq(id string) int {
	n, _ := strconv.Atoi(strings.TrimSuffix(id[strings.LastIndex(id, "/")+1:], "#raised"))
	return n
}

func killID(i int) string {
	ev := testEvent("bed-k", i, Raised)
	return ev.DedupID()
}
