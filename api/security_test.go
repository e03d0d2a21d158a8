package api

import (
	"bytes"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"io/fs"
	"log/slog"
	"math/big"
	"net"
	"net/http"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"
)

// TestDataFilesArePrivate: the data directory and everything in it is
// readable by the service's user alone (0700 directories, 0600 files).
func TestDataFilesArePrivate(t *testing.T) {
	dir := filepath.Join(t.TempDir(), "data")
	r := start(t, testConfig(t, dir))
	r.post(t, "", scenario(t, 1)[:400])
	r.waitCovered(t, 400)
	r.call(t, "POST", "/v1/checkpoints", "", nil)
	r.call(t, "POST", "/v1/events", "", []byte(`{"features":{"outdoor_c":"x"},"target":1}`))
	r.stop()
	n := 0
	filepath.WalkDir(dir, func(path string, d fs.DirEntry, err error) error {
		info, _ := d.Info()
		want := fs.FileMode(0o600)
		if d.IsDir() {
			want = 0o700
		}
		if info.Mode().Perm() != want {
			t.Errorf("%s has mode %v, want %v", path, info.Mode().Perm(), want)
		}
		n++
		return nil
	})
	if n < 5 {
		t.Errorf("only %d entries under the data directory", n)
	}
}

type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) { s.mu.Lock(); defer s.mu.Unlock(); return s.b.Write(p) }
func (s *syncBuf) String() string              { s.mu.Lock(); defer s.mu.Unlock(); return s.b.String() }

// TestLogsHoldNoSecrets: at the default level the log names neither the
// token nor any event payload, even when requests are refused.
func TestLogsHoldNoSecrets(t *testing.T) {
	var log syncBuf
	cfg := testConfig(t, t.TempDir())
	cfg.Token = "tok-7f3a9c-secret"
	cfg.Log = slog.New(slog.NewTextHandler(&log, nil))
	r := start(t, cfg)
	marker := "payload-marker-5521"
	r.call(t, "POST", "/v1/events", "wrong-token", []byte(`{"key":"`+marker+`","features":{"a":1},"target":1}`))
	r.call(t, "POST", "/v1/events", cfg.Token, []byte(`{"key":"`+marker+`","features":{"a":1},"target":1}`+"\n"+`{"key":"`+marker+`","features":{"a":"text"},"target":2}`))
	r.call(t, "POST", "/v1/predict", "", []byte(`{"key":"`+marker+`","features":{"a":1}}`))
	time.Sleep(50 * time.Millisecond)
	r.stop()
	out := log.String()
	if out == "" {
		t.Fatal("nothing was logged at all")
	}
	if strings.Contains(out, cfg.Token) || strings.Contains(out, marker) {
		t.Errorf("the log holds the token or a payload:\n%s", out)
	}
}

// TestTLS: with a certificate and key the service speaks HTTPS only.
func TestTLS(t *testing.T) {
	dir := t.TempDir()
	certPEM, keyPEM := selfSigned(t)
	cert, key := filepath.Join(dir, "cert.pem"), filepath.Join(dir, "key.pem")
	os.WriteFile(cert, certPEM, 0o600)
	os.WriteFile(key, keyPEM, 0o600)
	cfg := testConfig(t, filepath.Join(dir, "data"))
	cfg.TLSCert, cfg.TLSKey = cert, key
	svc, err := New(cfg)
	if err != nil {
		t.Fatal(err)
	}
	r := startSvc(t, svc)
	pool := x509.NewCertPool()
	pool.AppendCertsFromPEM(certPEM)
	client := &http.Client{Transport: &http.Transport{TLSClientConfig: &tls.Config{RootCAs: pool}}}
	resp, err := client.Get("https://" + svc.Addr() + "/healthz")
	if err != nil || resp.StatusCode != 200 {
		t.Fatalf("HTTPS /healthz: %v %v", err, resp)
	}
	resp.Body.Close()
	if resp, err := http.Get("http://" + svc.Addr() + "/healthz"); err == nil && resp.StatusCode == 200 {
		t.Error("plain HTTP was answered on the HTTPS port")
	}
	_ = r
	bad := testConfig(t, t.TempDir())
	bad.TLSCert = cert
	if _, err := New(bad); err == nil || !strings.Contains(err.Error(), "both --tls-cert and --tls-key") {
		t.Errorf("a certificate without its key: %v", err)
	}
}

func startSvc(t *testing.T, svc *Service) *running {
	t.Helper()
	ctx, cancel := newCancel()
	done := make(chan error, 1)
	go func() { done <- svc.Run(ctx) }()
	r := &running{svc: svc, base: "https://" + svc.Addr()}
	r.stop = func() error { cancel(); return <-done }
	t.Cleanup(func() { r.stop() })
	return r
}

func selfSigned(t *testing.T) (certPEM, keyPEM []byte) {
	t.Helper()
	k, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: "tidemark test"},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IPAddresses: []net.IP{net.ParseIP("127.0.0.1")}, KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{x509.ExtKeyUsageServerAuth}}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &k.PublicKey, k)
	if err != nil {
		t.Fatal(err)
	}
	kb, _ := x509.MarshalECPrivateKey(k)
	return pem.EncodeToMemory(&pem.Block{Type: "CERTIFICATE", Bytes: der}), pem.EncodeToMemory(&pem.Block{Type: "EC PRIVATE KEY", Bytes: kb})
}

// TestServerTimeouts: a client that opens a connection and sends half a
// header is cut off after the read-header timeout instead of holding the
// connection for ever; every server timeout is set.
func TestServerTimeouts(t *testing.T) {
	r := start(t, testConfig(t, t.TempDir()))
	srv := r.svc.http
	if srv.ReadHeaderTimeout <= 0 || srv.ReadTimeout <= 0 || srv.WriteTimeout <= 0 || srv.IdleTimeout <= 0 {
		t.Fatalf("timeouts %v %v %v %v: all must be set", srv.ReadHeaderTimeout, srv.ReadTimeout, srv.WriteTimeout, srv.IdleTimeout)
	}
	conn, err := net.Dial("tcp", r.svc.Addr())
	if err != nil {
		t.Fatal(err)
	}
	defer conn.Close()
	conn.Write([]byte("POST /v1/predict HTTP/1.1\r\nHost: x\r\n")) // and then nothing
	conn.SetReadDeadline(time.Now().Add(readHeaderTimeout + 5*time.Second))
	t0 := time.Now()
	buf := make([]byte, 512)
	for {
		if _, err := conn.Read(buf); err != nil {
			break
		}
	}
	if el := time.Since(t0); el > readHeaderTimeout+4*time.Second {
		t.Errorf("a half-sent header held the connection for %v", el)
	}
}
