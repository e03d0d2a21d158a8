package main

import (
	"os"
	"path/filepath"
	"strings"
	"testing"
)

// TestTokenWarnings: a token on the command line (visible in ps) or in a file
// readable by others is warned about; --token-file reads the token; without a
// token the service refuses to listen beyond loopback unless told so (issue
// 11, holes 4 and 7).
func TestTokenWarnings(t *testing.T) {
	dir := t.TempDir()
	base := []string{"--data", filepath.Join(dir, "data"), "--learner", "mean"}
	var stderr strings.Builder
	if _, err := serveConfig(append(base, "--token", "s3cret"), &stderr); err != nil {
		t.Fatal(err)
	}
	if !strings.Contains(stderr.String(), "--token, where other users") || strings.Contains(stderr.String(), "s3cret") {
		t.Errorf("--token: stderr %q, want a warning that names no token", stderr.String())
	}
	tf := filepath.Join(dir, "token")
	os.WriteFile(tf, []byte("from-file\n"), 0o644)
	stderr.Reset()
	cfg, err := serveConfig(append(base, "--token-file", tf), &stderr)
	if err != nil {
		t.Fatal(err)
	}
	if cfg.Token != "from-file" || !strings.Contains(stderr.String(), "readable by others") {
		t.Errorf("--token-file of mode 0644: token %q, stderr %q", cfg.Token, stderr.String())
	}
	os.Chmod(tf, 0o600)
	stderr.Reset()
	if _, err := serveConfig(append(base, "--token-file", tf), &stderr); err != nil || stderr.Len() != 0 {
		t.Errorf("--token-file of mode 0600: %v, stderr %q", err, stderr.String())
	}
	conf := filepath.Join(dir, "tidemark.yaml")
	os.WriteFile(conf, []byte("token: in-the-file\n"), 0o644)
	stderr.Reset()
	if _, err := serveConfig(append(base, "--config", conf), &stderr); err != nil || !strings.Contains(stderr.String(), "holds the token and is readable by others") {
		t.Errorf("config file with a token, mode 0644: %v, stderr %q", err, stderr.String())
	}
	if _, err := serveConfig(append(base, "--listen", "0.0.0.0:8080"), &stderr); err == nil || !strings.Contains(err.Error(), "--insecure-open-network") {
		t.Errorf("0.0.0.0 without a token: %v", err)
	}
	stderr.Reset()
	if _, err := serveConfig(append(base, "--listen", "0.0.0.0:8080", "--insecure-open-network"), &stderr); err != nil || !strings.Contains(stderr.String(), "INSECURE") {
		t.Errorf("--insecure-open-network: %v, stderr %q", err, stderr.String())
	}
}
