package intake

import (
	"bytes"
	"compress/gzip"
	"errors"
	"io"
	"os"
	"path/filepath"
	"strings"
	"testing"

	"github.com/klauspost/compress/zstd"
)

func readAll(t *testing.T, h *History) (lines []string, tooLong []int64) {
	t.Helper()
	for {
		line, no, err := h.Next()
		if err == io.EOF {
			return lines, tooLong
		}
		if errors.Is(err, ErrLineTooLong) {
			tooLong = append(tooLong, no)
			continue
		}
		if err != nil {
			t.Fatal(err)
		}
		if int(no) != len(lines)+len(tooLong)+1 {
			t.Fatalf("line number %d, want %d", no, len(lines)+len(tooLong)+1)
		}
		lines = append(lines, string(line))
	}
}

func TestHistoryPlainGzipZstd(t *testing.T) {
	content := "{\"target\":1}\r\n\n{\"target\":2}\n{\"target\":3}" // CRLF, a blank line, no final newline
	want := []string{`{"target":1}`, ``, `{"target":2}`, `{"target":3}`}
	dir := t.TempDir()
	var gz, zs bytes.Buffer
	g := gzip.NewWriter(&gz)
	g.Write([]byte(content))
	g.Close()
	z, _ := zstd.NewWriter(&zs)
	z.Write([]byte(content))
	z.Close()
	for name, data := range map[string][]byte{"h.ndjson": []byte(content), "h.ndjson.gz": gz.Bytes(), "h.ndjson.zst": zs.Bytes()} {
		path := filepath.Join(dir, name)
		os.WriteFile(path, data, 0o600)
		h, err := OpenHistory(path)
		if err != nil {
			t.Fatal(err)
		}
		lines, _ := readAll(t, h)
		h.Close()
		if strings.Join(lines, "|") != strings.Join(want, "|") {
			t.Errorf("%s: lines %q, want %q", name, lines, want)
		}
		if h.BytesRead() != int64(len(data)) || h.Size() != int64(len(data)) {
			t.Errorf("%s: read %d of %d bytes, want all %d", name, h.BytesRead(), h.Size(), len(data))
		}
	}
}

func TestHistoryTooLongLineIsSkipped(t *testing.T) {
	long := strings.Repeat("x", MaxLineBytes+10)
	h := NewHistoryReader(strings.NewReader("a\n" + long + "\nb\n"))
	lines, tooLong := readAll(t, h)
	if strings.Join(lines, ",") != "a,b" || len(tooLong) != 1 || tooLong[0] != 2 {
		t.Errorf("lines %q too long %v, want a,b and [2]", lines, tooLong)
	}
}

func TestHistoryBadGzip(t *testing.T) {
	path := filepath.Join(t.TempDir(), "bad.gz")
	os.WriteFile(path, []byte("not gzip"), 0o600)
	if _, err := OpenHistory(path); err == nil {
		t.Error("opened a corrupt .gz without error")
	}
}
