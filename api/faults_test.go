package api

import (
	"os"
	"strings"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/checkpoint"
)

// diskBudget fails writes once its budget of bytes is spent, with ENOSPC, as
// a full disk does; a write that does not fit writes what fits first.
type diskBudget struct{ left atomic.Int64 }

func (d *diskBudget) take(n int) (int, error) {
	if d.left.Add(-int64(n)) >= 0 {
		return n, nil
	}
	fit := int(d.left.Add(int64(n)))
	if fit < 0 {
		fit = 0
	}
	d.left.Store(0)
	return fit, &os.PathError{Op: "write", Path: "disk", Err: syscall.ENOSPC}
}

type budgetFile struct {
	*os.File
	d *diskBudget
}

func (f budgetFile) Write(p []byte) (int, error) {
	n, err := f.d.take(len(p))
	if n > 0 {
		if _, werr := f.File.Write(p[:n]); werr != nil {
			return 0, werr
		}
	}
	return n, err
}

type budgetFS struct {
	checkpoint.OSFS
	d *diskBudget
}

type budgetCkFile struct {
	checkpoint.File
	d *diskBudget
}

func (f budgetCkFile) Write(p []byte) (int, error) {
	n, err := f.d.take(len(p))
	if n > 0 {
		f.File.Write(p[:n])
	}
	return n, err
}

func (b budgetFS) Create(path string) (checkpoint.File, error) {
	f, err := b.OSFS.Create(path)
	if err != nil {
		return nil, err
	}
	return budgetCkFile{f, b.d}, nil
}

// TestFullDisk: when the disk fills, POST /v1/events and POST
// /v1/checkpoints fail with a clear message, what was stored before stays
// intact, predictions are still served, and both recover once space returns.
func TestFullDisk(t *testing.T) {
	disk := &diskBudget{}
	disk.left.Store(1 << 40)
	cfg := testConfig(t, t.TempDir())
	cfg.CheckpointEvery = 1 << 40
	cfg.JournalFile = func(f *os.File) intake.File { return budgetFile{f, disk} }
	cfg.CheckpointFS = budgetFS{d: disk}
	r := start(t, cfg)
	lines := scenario(t, 1)
	r.post(t, "", lines[:300])
	r.waitCovered(t, 300)
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Fatalf("checkpoint: %d %s", code, b)
	}

	disk.left.Store(100) // the disk is all but full
	code, b := r.call(t, "POST", "/v1/events", "", []byte(strings.Join([]string{string(lines[300]), string(lines[301])}, "\n")))
	if code != 503 || !strings.Contains(string(b), "could not be stored durably") {
		t.Errorf("POST /v1/events on a full disk: %d %s, want 503 saying so", code, b)
	}
	disk.left.Store(100)
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 503 || !strings.Contains(string(b), "earlier ones are intact") {
		t.Errorf("POST /v1/checkpoints on a full disk: %d %s, want 503", code, b)
	}
	row := []byte(`{"key":"room-a","time":"2026-03-01T12:00:00Z","features":{"outdoor_c":10,"door_min":1,"shift":"day"}}`)
	if code, b := r.call(t, "POST", "/v1/predict", "", row); code != 200 {
		t.Errorf("predict on a full disk: %d %s, want answers as before", code, b)
	}
	_, m := r.call(t, "GET", "/metrics", "", nil)
	for _, want := range []string{"tidemark_journal_write_failures_total 1", "tidemark_checkpoint_failures_total 1"} {
		if !strings.Contains(string(m), want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}

	disk.left.Store(1 << 40) // space is back
	r.post(t, "", lines[300:400])
	rep := r.waitCovered(t, 400)
	if rep.Events != 400 {
		t.Errorf("after the disk recovered: %d events applied, want 400 (nothing lost, the failed request not applied)", rep.Events)
	}
	if code, _ := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Errorf("checkpoint after the disk recovered: %d", code)
	}
	if err := r.stop(); err != nil {
		t.Fatal(err)
	}
	// Everything stored survives a restart intact.
	r2 := start(t, cfg)
	if got := r2.report(t); got.Events != 400 {
		t.Errorf("after restart: %d events, want 400", got.Events)
	}
}

// switchFS fails every new file while fail is set, as a vanished or
// read-only disk does.
type switchFS struct {
	checkpoint.OSFS
	fail *atomic.Bool
}

func (f switchFS) Create(path string) (checkpoint.File, error) {
	if f.fail.Load() {
		return nil, &os.PathError{Op: "open", Path: path, Err: syscall.EROFS}
	}
	return f.OSFS.Create(path)
}

// startWithCheckpoint starts a service whose checkpoint writes fail while
// the returned flag is set, feeds it the scenario's first n events and takes
// checkpoint 1 of them.
func startWithCheckpoint(t *testing.T, n int) (r *running, cfg Config, fail *atomic.Bool, lines [][]byte) {
	t.Helper()
	fail = new(atomic.Bool)
	cfg = testConfig(t, t.TempDir())
	cfg.CheckpointEvery = 1 << 40
	cfg.CheckpointFS = switchFS{fail: fail}
	r = start(t, cfg)
	lines = scenario(t, 1)
	r.post(t, "", lines[:n])
	r.waitCovered(t, int64(n))
	if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
		t.Fatalf("checkpoint: %d %s", code, b)
	}
	return r, cfg, fail, lines
}

// TestRestoreFailsWholeWhenItsCheckpointFails: a restore becomes live only
// once the checkpoint recording it is durable. When that checkpoint cannot
// be written the answer is 503, saying so, and the state is the one from
// before the request (issue 11, hole 1: the failure was only logged).
func TestRestoreFailsWholeWhenItsCheckpointFails(t *testing.T) {
	r, _, fail, lines := startWithCheckpoint(t, 200)
	r.post(t, "", lines[200:300])
	before := r.waitCovered(t, 300)

	fail.Store(true)
	code, b := r.call(t, "POST", "/v1/checkpoints/1/restore", "", []byte(`{"resume":"from_now"}`))
	if code != 503 || !strings.Contains(string(b), "not done") {
		t.Errorf("restore whose checkpoint fails: %d %s, want 503 saying it was not done", code, b)
	}
	after := r.report(t)
	sameJSON(t, "state after a failed restore", after.Learners, before.Learners)
	if after.Events != 300 {
		t.Errorf("after a failed restore: %d events, want 300", after.Events)
	}

	fail.Store(false)
	if code, b := r.call(t, "POST", "/v1/checkpoints/1/restore", "", []byte(`{"resume":"from_now"}`)); code != 200 {
		t.Errorf("restore once the disk is back: %d %s", code, b)
	}
	deadline := time.Now().Add(10 * time.Second)
	for r.report(t).Events != 200 {
		if time.Now().After(deadline) {
			t.Fatalf("after the restore: %d events, want 200", r.report(t).Events)
		}
		time.Sleep(5 * time.Millisecond)
	}
}

// countFS counts whole-file reads of checkpoint files.
type countFS struct {
	checkpoint.OSFS
	reads *atomic.Int64
}

func (f countFS) ReadFile(path string) ([]byte, error) {
	f.reads.Add(1)
	return f.OSFS.ReadFile(path)
}

// TestListingReadsManifestsOnce: GET /v1/checkpoints and the dashboard read a
// checkpoint file at most once, when they first list it; after that a listing
// costs a directory read (issue 11, hole 5: every listing decompressed and
// verified every retained checkpoint, and each dashboard refresh read ten).
func TestListingReadsManifestsOnce(t *testing.T) {
	var reads atomic.Int64
	cfg := testConfig(t, t.TempDir())
	cfg.CheckpointEvery = 1 << 40
	cfg.CheckpointFS = countFS{reads: &reads}
	r := start(t, cfg)
	lines := scenario(t, 1)
	for i := 0; i < 5; i++ {
		r.post(t, "", lines[i*50:(i+1)*50])
		r.waitCovered(t, int64((i+1)*50))
		if code, b := r.call(t, "POST", "/v1/checkpoints", "", nil); code != 201 {
			t.Fatalf("checkpoint: %d %s", code, b)
		}
	}
	r.call(t, "GET", "/v1/checkpoints", "", nil) // written by this process: known already
	base := reads.Load()
	for i := 0; i < 10; i++ {
		if code, b := r.call(t, "GET", "/v1/checkpoints", "", nil); code != 200 || !strings.Contains(string(b), `"version":5`) {
			t.Fatalf("GET /v1/checkpoints: %d %s", code, b)
		}
		if code, _ := r.call(t, "GET", "/", "", nil); code != 200 {
			t.Fatalf("GET /: %d", code)
		}
	}
	if n := reads.Load() - base; n != 0 {
		t.Errorf("10 listings and 10 dashboard pages read %d checkpoint files, want 0", n)
	}
}
