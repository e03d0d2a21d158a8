package persist

import (
	"bytes"
	"encoding/binary"
	"errors"
	"hash/crc32"
	"os"
	"path/filepath"
	"testing"

	"tidemark/checkpoint"
	"tidemark/learner"
)

// TestAdoptNewestChecksDigestWhileDecoding: a checkpoint whose every other
// check passes — a valid CRC-32C over a manifest whose state digest was
// altered — is opened, decoded, and refused when its digest is checked
// alongside; the newest good one before it is adopted instead, and the
// refused one is reported. The engine never holds the refused state.
func TestAdoptNewestChecksDigestWhileDecoding(t *testing.T) {
	spec, _ := learner.ParseSpec("rls:forget=0.99")
	cfg := learner.Config{Learners: []learner.Spec{spec}}
	eng, _ := learner.NewEngine(cfg)
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: t.TempDir()})
	if err != nil {
		t.Fatal(err)
	}
	defer store.Close()
	apply := func(from, to int) {
		for i := from; i < to; i++ {
			eng.Apply(learner.Position{Offset: int64(i)}, &learner.Event{Key: "k", Target: float64(i % 5), Features: []learner.Feature{{Name: "x", Num: float64(i % 7)}}})
		}
	}
	apply(1, 100)
	good, err := Save(store, eng, checkpoint.Manual, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	apply(100, 200)
	bad, err := Save(store, eng, checkpoint.Manual, 0, nil)
	if err != nil {
		t.Fatal(err)
	}
	// Alter one hex digit of the newest's state_sha256 and seal the file
	// again with a correct CRC-32C.
	path := filepath.Join(store.Dir(), bad.File)
	b, _ := os.ReadFile(path)
	i := bytes.Index(b, []byte(bad.StateSHA256))
	if i < 0 {
		t.Fatal("the manifest does not hold the state digest")
	}
	b[i] ^= 1 // '0'..'9' and 'a'..'f' stay printable and change
	body := b[:len(b)-4]
	binary.LittleEndian.PutUint32(b[len(b)-4:], crc32.Checksum(body, crc32.MakeTable(crc32.Castagnoli)))
	os.WriteFile(path, b, 0o600)
	if _, err := store.Open(bad.Version); err != nil {
		t.Fatalf("the altered file should pass every check but the digest: %v", err)
	}

	fresh, _ := learner.NewEngine(cfg)
	c, skipped, err := AdoptNewest(store, fresh, "")
	if err != nil {
		t.Fatal(err)
	}
	if c == nil || c.Manifest.Version != good.Version {
		t.Fatalf("adopted %v, want version %d", c, good.Version)
	}
	if len(skipped) != 1 || !errors.Is(skipped[0], checkpoint.ErrChecksum) {
		t.Errorf("passed over %v, want the altered version's digest mismatch", skipped)
	}
	if fresh.Applied() != good.Events {
		t.Errorf("the engine holds %d events, the good checkpoint %d", fresh.Applied(), good.Events)
	}
	// Adopting the altered one directly leaves the engine as it was.
	c2, _ := store.Open(bad.Version)
	if err := Adopt(fresh, c2, ""); !errors.Is(err, checkpoint.ErrCorrupt) || fresh.Applied() != good.Events {
		t.Errorf("adopting the altered checkpoint: %v, engine at %d events", err, fresh.Applied())
	}
}
