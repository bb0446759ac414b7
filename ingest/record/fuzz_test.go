package record

import (
	"bytes"
	"io"
	"testing"
	"time"

	"trapline/ingest"
)

// FuzzSegment feeds arbitrary bytes to the segment reader: it must never
// panic, and every record it accepts must encode back to the bytes it was
// read from (the reader invents nothing).
func FuzzSegment(f *testing.F) {
	src := Source{Stream: "bed-1", Format: ingest.FormatText, Columns: ingest.DefaultColumns, RateHz: 100}
	t0 := time.Unix(1_700_000_000, 0)
	good := appendHeader(nil, src, t0)
	good = appendRecord(good, KindData, t0, []byte("0.01,5,0.5\n"))
	good = appendRecord(good, KindReset, t0.Add(time.Second), nil)
	f.Add(good)
	f.Add(good[:len(good)-3])
	f.Add(good[:40])
	f.Add([]byte{})
	f.Add(magic[:])
	f.Fuzz(func(t *testing.T, b []byte) {
		sc, err := newScanner(bytes.NewReader(b))
		if err != nil {
			return
		}
		off := sc.head.Len
		if !bytes.Equal(appendHeader(nil, sc.head.Source, sc.head.Created), b[:off]) {
			t.Fatalf("header %+v does not encode back to its bytes", sc.head)
		}
		for {
			rec, err := sc.next()
			if err == io.EOF {
				break
			}
			enc := appendRecord(nil, rec.Kind, rec.Time, rec.Payload)
			if !bytes.Equal(enc, b[off:off+len(enc)]) {
				t.Fatalf("record at %d does not encode back to its bytes", off)
			}
			off += len(enc)
		}
		if uint64(off-sc.head.Len)+sc.st.SkippedBytes != uint64(len(b)-sc.head.Len) {
			t.Fatalf("read %d bytes and skipped %d of %d", off-sc.head.Len, sc.st.SkippedBytes, len(b)-sc.head.Len)
		}
	})
}

// FuzzIndex reads arbitrary index files: no panic, and every entry it
// accepts writes back to a line that reads as the same entry.
func FuzzIndex(f *testing.F) {
	seg := Segment{Name: "bed-1.20260301T100000.000Z" + SegmentExt, Stream: "bed-1", Format: ingest.FormatText,
		First: time.Unix(1, 2), Last: time.Unix(3, 4), Records: 5, Bytes: 6}
	f.Add(appendIndexLine([]byte(indexHeader), seg))
	f.Add([]byte("x.trseg\tbed\ttext\t1\t2\t-3\t4\n"))
	f.Fuzz(func(t *testing.T, b []byte) {
		segs, _ := parseIndex(b)
		for _, s := range segs {
			back, bad := parseIndex(appendIndexLine(nil, s))
			if bad != 0 || len(back) != 1 || back[0] != s {
				t.Fatalf("entry %+v does not read back: %+v", s, back)
			}
		}
	})
}
