package main

import (
	"bytes"
	"os"
	"path/filepath"
	"strings"
	"testing"
	"time"
)

func TestServeConfigListsEveryProblem(t *testing.T) {
	var stderr bytes.Buffer
	_, err := serveConfig([]string{"--learner", "knn:k=0", "--learner", "rls:forget=2", "--listen", "nohost", "--max-keys", "0"}, &stderr)
	if err == nil {
		t.Fatal("an invalid configuration was accepted")
	}
	for _, want := range []string{"k=0", "forget=2", "--max-keys 0"} {
		if !strings.Contains(err.Error(), want) {
			t.Errorf("error does not mention %q:\n%v", want, err)
		}
	}
	_, err = serveConfig([]string{"--learner", "mean", "--listen", "nohost"}, &stderr)
	for _, want := range []string{"data directory: required", `listen address "nohost"`} {
		if err == nil || !strings.Contains(err.Error(), want) {
			t.Errorf("error does not mention %q: %v", want, err)
		}
	}
	if code := run([]string{"serve", "--learner", "mean"}, &bytes.Buffer{}, &stderr); code != 2 {
		t.Errorf("serve without --data: exit %d, want 2", code)
	}
}

func TestServeConfigFileAndFlags(t *testing.T) {
	dir := t.TempDir()
	path := filepath.Join(dir, "tidemark.yaml")
	os.WriteFile(path, []byte(`
listen: 127.0.0.1:9999
data: `+dir+`
learners: ["knn:k=7,window=500", "mean"]
checkpoint_every: 123
checkpoint_interval: 90s
min_scored: 3
features:
  hash_buckets: 8
  time_features: true
kafka:
  brokers: [a:9092, b:9092]
  topic: power
`), 0o600)
	cfg, err := serveConfig([]string{"--config", path, "--listen", "127.0.0.1:7777", "--token", "t0k"}, &bytes.Buffer{})
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Listen != "127.0.0.1:7777" || cfg.DataDir != dir || cfg.CheckpointEvery != 123 || cfg.CheckpointInterval != 90*time.Second ||
		cfg.MinScored != 3 || cfg.Token != "t0k" || len(cfg.Engine.Learners) != 2 || cfg.Engine.Learners[0].KNN.K != 7 ||
		cfg.Engine.Features.HashBuckets != 8 || !cfg.Engine.Features.TimeFeatures ||
		cfg.Kafka == nil || cfg.Kafka.Topic != "power" || len(cfg.Kafka.Brokers) != 2 || cfg.Kafka.Group != "tidemark" {
		t.Errorf("config %+v", cfg)
	}
	t.Setenv(TokenEnv, "from-env")
	cfg, _ = serveConfig([]string{"--config", path}, &bytes.Buffer{})
	if cfg.Token != "from-env" {
		t.Errorf("token %q, want the one from $%s", cfg.Token, TokenEnv)
	}
	os.WriteFile(path, []byte("learners: [mean]\ndata: x\nlisten_port: 3\n"), 0o600)
	if _, err := serveConfig([]string{"--config", path}, &bytes.Buffer{}); err == nil || !strings.Contains(err.Error(), "listen_port") {
		t.Errorf("unknown key: %v, want it named", err)
	}
}
