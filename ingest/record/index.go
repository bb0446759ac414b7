package record

import (
	"bufio"
	"bytes"
	"fmt"
	"os"
	"path/filepath"
	"sort"
	"strconv"
	"strings"
	"time"

	"trapline/ingest"
)

// IndexName is the name of the index file in a recording directory.
const IndexName = "index.tsv"

// indexHeader opens the index file; the second line names the columns.
const indexHeader = "# trapline recording index v1\n# segment\tstream\tformat\tfirst_unix_ns\tlast_unix_ns\trecords\tbytes\n"

// Segment describes one closed segment file of a recording.
type Segment struct {
	// Name is the file name inside the recording directory.
	Name string
	// Stream is the id of the source stream recorded in it.
	Stream string
	// Format is the wire format of its bytes.
	Format ingest.Format
	// First and Last are the receive times of its first and last record.
	First, Last time.Time
	// Records is the number of records.
	Records uint64
	// Bytes is the size of the file.
	Bytes int64
}

// appendIndexLine appends the index line of s.
func appendIndexLine(dst []byte, s Segment) []byte {
	dst = append(dst, s.Name...)
	dst = append(dst, '\t')
	dst = append(dst, s.Stream...)
	dst = append(dst, '\t')
	dst = append(dst, s.Format...)
	for _, n := range []int64{s.First.UnixNano(), s.Last.UnixNano(), int64(s.Records), s.Bytes} {
		dst = append(dst, '\t')
		dst = strconv.AppendInt(dst, n, 10)
	}
	return append(dst, '\n')
}

// parseIndex reads an index file; lines that do not parse are skipped and
// counted, so that a damaged index costs a rescan, not the recording.
func parseIndex(data []byte) (segs []Segment, bad int) {
	sc := bufio.NewScanner(bytes.NewReader(data))
	for sc.Scan() {
		line := sc.Text()
		if line == "" || strings.HasPrefix(line, "#") {
			continue
		}
		s, ok := parseIndexLine(line)
		if !ok {
			bad++
			continue
		}
		segs = append(segs, s)
	}
	return segs, bad
}

func parseIndexLine(line string) (Segment, bool) {
	f := strings.Split(line, "\t")
	if len(f) != 7 || !strings.HasSuffix(f[0], SegmentExt) || strings.ContainsAny(f[0], `/\`) {
		return Segment{}, false
	}
	var n [4]int64
	for i := range n {
		v, err := strconv.ParseInt(f[3+i], 10, 64)
		if err != nil || v < 0 && i >= 2 {
			return Segment{}, false
		}
		n[i] = v
	}
	format, err := ingest.ParseFormat(f[2])
	if err != nil || f[2] == "" || !ingest.ValidStreamID(f[1]) {
		return Segment{}, false
	}
	return Segment{Name: f[0], Stream: f[1], Format: format,
		First: time.Unix(0, n[0]).UTC(), Last: time.Unix(0, n[1]).UTC(), Records: uint64(n[2]), Bytes: n[3]}, true
}

// sortSegments orders segments by first record time, then name.
func sortSegments(segs []Segment) {
	sort.Slice(segs, func(i, j int) bool {
		if !segs[i].First.Equal(segs[j].First) {
			return segs[i].First.Before(segs[j].First)
		}
		return segs[i].Name < segs[j].Name
	})
}

// loadSegments lists the segments of dir: those in the index whose file
// exists, and every other segment file found on disk (a segment still open
// when the writer stopped), summarised by reading it. skip names files not
// to read (the writer's open segments).
func loadSegments(dir string, skip map[string]bool) ([]Segment, ScanStats, error) {
	var st ScanStats
	known := map[string]Segment{}
	if data, err := os.ReadFile(filepath.Join(dir, IndexName)); err == nil {
		segs, _ := parseIndex(data)
		for _, s := range segs {
			known[s.Name] = s
		}
	} else if !os.IsNotExist(err) {
		return nil, st, fmt.Errorf("read index: %w", err)
	}
	entries, err := os.ReadDir(dir)
	if err != nil {
		return nil, st, fmt.Errorf("read recording directory: %w", err)
	}
	var out []Segment
	for _, e := range entries {
		name := e.Name()
		if !e.Type().IsRegular() || !strings.HasSuffix(name, SegmentExt) || skip[name] {
			continue
		}
		if s, ok := known[name]; ok {
			out = append(out, s)
			continue
		}
		sum, sst, err := summarize(filepath.Join(dir, name))
		st.add(sst)
		if err != nil {
			continue
		}
		if sum.records == 0 {
			sum.first, sum.last = sum.head.Created, sum.head.Created
		}
		out = append(out, Segment{Name: name, Stream: sum.head.Stream, Format: sum.head.Format,
			First: sum.first, Last: sum.last, Records: sum.records, Bytes: sum.bytes})
	}
	sortSegments(out)
	return out, st, nil
}

// segmentName returns the file name of a segment of stream whose first
// record arrived at t; n > 0 tells names apart within one millisecond.
func segmentName(stream string, t time.Time, n int) string {
	name := stream + "." + t.UTC().Format("20060102T150405.000Z")
	if n > 0 {
		name += "." + strconv.Itoa(n)
	}
	return name + SegmentExt
}
