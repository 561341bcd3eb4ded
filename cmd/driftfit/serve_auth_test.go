package main

import (
	"bytes"
	"context"
	"fmt"
	"net"
	"os"
	"path/filepath"
	"strings"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
)

// syncBuf is a bytes.Buffer safe for the serve goroutine and the test.
type syncBuf struct {
	mu sync.Mutex
	b  bytes.Buffer
}

func (s *syncBuf) Write(p []byte) (int, error) { s.mu.Lock(); defer s.mu.Unlock(); return s.b.Write(p) }
func (s *syncBuf) String() string              { s.mu.Lock(); defer s.mu.Unlock(); return s.b.String() }

func freePort(t *testing.T) int {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	defer ln.Close()
	return ln.Addr().(*net.TCPAddr).Port
}

// TestServe_PrivateDataAndUsers runs serve in process on a data
// directory that already exists with mode 0755 and an embedded bus with
// users: the directory ends 0700 with a warning saying so; a client
// without credentials is refused; alerts, run with the same --config as
// serve and the reader's password in its variable, reads the locked file
// through the service; calibrated as the technician records a
// calibration, and is refused another unit's sensor. No log line or
// output shows a password.
func TestServe_PrivateDataAndUsers(t *testing.T) {
	if testing.Short() {
		t.Skip("runs serve")
	}
	const readerPw, techPw, plantPw = "reader-2Jd5", "tech-8Kw1", "plant-4Zr7"
	t.Setenv("QM_READER_PASSWORD", readerPw)
	t.Setenv("QM_TECH_U1_PASSWORD", techPw)
	t.Setenv("QM_PLANT_PASSWORD", plantPw)
	dir := t.TempDir()
	data := filepath.Join(dir, "data")
	if err := os.Mkdir(data, 0o755); err != nil {
		t.Fatal(err)
	}
	if err := os.Chmod(data, 0o755); err != nil { // whatever the umask
		t.Fatal(err)
	}
	cfgPath := filepath.Join(dir, "serve.yaml")
	cfg := fmt.Sprintf(`bus:
  embedded:
    users:
      - {user: qm-plant, password_env: QM_PLANT_PASSWORD, role: publisher, sensors: ["qm.>"]}
      - {user: qm-tech-u1, password_env: QM_TECH_U1_PASSWORD, role: technician, sensors: ["qm.u1.>"]}
      - {user: qm-reader, password_env: QM_READER_PASSWORD, role: reader}
store:
  dir: %s
  commit_interval: 50ms
`, data)
	if err := os.WriteFile(cfgPath, []byte(cfg), 0o600); err != nil {
		t.Fatal(err)
	}
	port := freePort(t)
	url := fmt.Sprintf("nats://127.0.0.1:%d", port)
	var logs syncBuf
	ctx, cancel := context.WithCancel(context.Background())
	done := make(chan error, 1)
	go func() {
		done <- runServe(ctx, []string{"--config", cfgPath, "--nats-port", fmt.Sprint(port), "--http-addr", "off"}, nil, &logs, &logs)
	}()
	defer func() {
		cancel()
		if err := <-done; err != nil {
			t.Errorf("serve: %v", err)
		}
		for _, pw := range []string{readerPw, techPw, plantPw} {
			if strings.Contains(logs.String(), pw) {
				t.Errorf("serve's log shows a password")
			}
		}
	}()
	for deadline := time.Now().Add(30 * time.Second); !strings.Contains(logs.String(), "ingest started"); time.Sleep(20 * time.Millisecond) {
		if time.Now().After(deadline) {
			t.Fatalf("serve did not start; log:\n%s", logs.String())
		}
	}
	fi, err := os.Stat(data)
	if err != nil {
		t.Fatal(err)
	}
	if fi.Mode().Perm() != 0o700 {
		t.Errorf("data directory mode %04o after serve started, want 0700", fi.Mode().Perm())
	}
	if !strings.Contains(logs.String(), "data directory was open to other users: tightened") || !strings.Contains(logs.String(), `"was":"0755"`) {
		t.Errorf("no warning that the data directory was tightened from 0755; log:\n%s", logs.String())
	}
	if strings.Contains(logs.String(), "without authentication") {
		t.Errorf("warned about a bus without authentication, with users configured")
	}

	if nc, err := nats.Connect(url); err == nil {
		nc.Close()
		t.Error("client without credentials accepted by serve's embedded bus")
	}
	// A reading of the technician's sensor, from the publisher.
	nc, err := nats.Connect(url, nats.UserInfo("qm-plant", plantPw))
	if err != nil {
		t.Fatal(err)
	}
	defer nc.Close()
	js, err := nc.JetStream()
	if err != nil {
		t.Fatal(err)
	}
	if _, err := js.Publish("driftfit.in.qm.u1.steam.pt-101", fmt.Appendf(nil, `{"t":%q,"v":1000}`, time.Now().Add(-time.Minute).UTC().Format(time.RFC3339))); err != nil {
		t.Fatal(err)
	}
	time.Sleep(300 * time.Millisecond)

	stdout, stderr, code := runCmd(t, "", "alerts", "--config", cfgPath, "--servers", url)
	if code != 0 {
		t.Errorf("alerts through the service: exit %d, stderr:\n%s", code, stderr)
	}
	stdout2, stderr2, code := runCmd(t, "", "calibrated", "qm.u1.steam.pt-101", "--as-found", "1000.4", "--as-left", "1000", "--config", cfgPath, "--servers", url)
	if code != 0 || !strings.Contains(stdout2, "calibration 1 of qm.u1.steam.pt-101 recorded (as-found 1000.4, as-left 1000, at ") {
		t.Errorf("calibrated as the technician: exit %d, stdout %q, stderr:\n%s", code, stdout2, stderr2)
	}
	_, stderr3, code := runCmd(t, "", "calibrated", "qm.u2.steam.pt-101", "--force", "--as-found", "1", "--as-left", "1", "--config", cfgPath, "--servers", url)
	if code == 0 || !strings.Contains(stderr3, "not permitted on the bus") {
		t.Errorf("calibrated of another unit's sensor as the technician: exit %d, stderr:\n%s", code, stderr3)
	}
	for _, out := range []string{stdout, stderr, stdout2, stderr2, stderr3} {
		for _, pw := range []string{readerPw, techPw, plantPw} {
			if strings.Contains(out, pw) {
				t.Errorf("command output shows a password: %s", out)
			}
		}
	}
}
