package api

import (
	"bytes"
	"context"
	"encoding/json"
	"flag"
	"fmt"
	"os"
	"path/filepath"
	"reflect"
	"slices"
	"testing"
	"time"

	"tidemark/api/intake"
	"tidemark/api/persist"
	"tidemark/api/replay"
	"tidemark/bench/synth"
	"tidemark/checkpoint"
	"tidemark/learner"
)

var (
	update       = flag.Bool("update", false, "rewrite the golden checkpoint in testdata (only when the format version changes)")
	updateReport = flag.Bool("update-report", false, "rewrite testdata/checkpoint-v1/report.json from the golden checkpoint (only when a report's definition changes on purpose)")
)

const goldenDir = "../testdata/checkpoint-v1"

var goldenSpecs = []string{"knn:k=3,window=50", "rls:forget=0.99", "sliding-rls:window=40", "mean:window=20"}

func goldenEngine(t *testing.T) *learner.Engine {
	t.Helper()
	cfg := learner.Config{Features: learner.FeatureConfig{HashBuckets: 2}, Score: learner.ScoreConfig{Recent: 10}}
	for _, s := range goldenSpecs {
		sp, err := learner.ParseSpec(s)
		if err != nil {
			t.Fatal(err)
		}
		cfg.Learners = append(cfg.Learners, sp)
	}
	eng, err := learner.NewEngine(cfg)
	if err != nil {
		t.Fatal(err)
	}
	return eng
}

// TestGoldenCheckpointV1 loads the format-version-1 checkpoint kept in
// testdata. Every later build must still load it, decode its state and report
// the metrics recorded beside it. With -update it is rewritten from a replay
// of the first 200 lines of the demo scenario (seed 3).
func TestGoldenCheckpointV1(t *testing.T) {
	if *update {
		os.RemoveAll(goldenDir)
		store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: goldenDir,
			Now: func() time.Time { return time.Date(2026, 12, 1, 0, 0, 0, 0, time.UTC) }})
		if err != nil {
			t.Fatal(err)
		}
		var buf bytes.Buffer
		synth.Write(&buf, synth.Config{Days: 1, Seed: 3})
		lines := bytes.SplitAfter(buf.Bytes(), []byte("\n"))
		eng := goldenEngine(t)
		h := intake.NewHistoryReader(bytes.NewReader(bytes.Join(lines[:200], nil)))
		if err := replay.Replay(context.Background(), h, eng, replay.ReplayConfig{Checkpoints: store}); err != nil {
			t.Fatal(err)
		}
		store.Close()
		rep, _ := json.MarshalIndent(eng.Report(true), "", "  ")
		os.WriteFile(filepath.Join(goldenDir, "report.json"), rep, 0o644)
	}
	store, err := checkpoint.OpenStore(checkpoint.StoreConfig{Dir: goldenDir})
	if err != nil {
		t.Fatal(err)
	}
	defer store.Close()
	c, err := store.Load(1)
	if err != nil {
		t.Fatalf("the golden version-1 checkpoint no longer loads: %v", err)
	}
	eng := goldenEngine(t)
	if err := eng.DecodeSections(persist.FromCheckpoint(c.Sections)); err != nil {
		t.Fatalf("its state no longer decodes: %v", err)
	}
	// A checkpoint of this configuration written by the build before the
	// key cap left the configuration digest (fc74117, which recorded this
	// digest for it) still resumes: a service upgraded in place goes on.
	const before = "5d289325d7839864b8d029313da1c4a4b4b7426884fb697065dc45625c45ccb3"
	if !slices.Contains(eng.Config().Digests(), before) {
		t.Errorf("a checkpoint of the previous build, digest %s, would no longer resume (accepted: %v)", before, eng.Config().Digests())
	}
	if *updateReport {
		rep, _ := json.MarshalIndent(eng.Report(true), "", "  ")
		os.WriteFile(filepath.Join(goldenDir, "report.json"), rep, 0o644)
	}
	wantJSON, err := os.ReadFile(filepath.Join(goldenDir, "report.json"))
	if err != nil {
		t.Fatal(err)
	}
	gotJSON, _ := json.Marshal(eng.Report(true))
	var want, got map[string]any
	json.Unmarshal(wantJSON, &want)
	json.Unmarshal(gotJSON, &got)
	// Every field recorded then must hold the same value now, at any depth;
	// fields added to the report since are allowed.
	if where := recorded(want, got, "report"); where != "" {
		t.Errorf("the golden checkpoint reports something else than recorded at %s", where)
	}
}

// recorded returns "" when every value in want appears, equal, at the same
// place in got (got may hold more map keys), else the path of the first
// difference.
func recorded(want, got any, path string) string {
	switch w := want.(type) {
	case map[string]any:
		g, ok := got.(map[string]any)
		if !ok {
			return path
		}
		for k, v := range w {
			if p := recorded(v, g[k], path+"."+k); p != "" {
				return p
			}
		}
		return ""
	case []any:
		g, ok := got.([]any)
		if !ok || len(g) != len(w) {
			return path
		}
		for i := range w {
			if p := recorded(w[i], g[i], fmt.Sprintf("%s[%d]", path, i)); p != "" {
				return p
			}
		}
		return ""
	}
	if !reflect.DeepEqual(want, got) {
		return fmt.Sprintf("%s (golden %v, now %v)", path, want, got)
	}
	return ""
}
