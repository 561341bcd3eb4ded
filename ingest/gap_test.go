package ingest_test

import (
	"errors"
	"fmt"
	"io"
	"math"
	"net"
	"path/filepath"
	"sync"
	"testing"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/rs/zerolog"

	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// resetProxy forwards TCP connections from 127.0.0.1 to a server and can
// reset every connection it holds, as a failing network path does while
// the server stays up.
type resetProxy struct {
	ln     net.Listener
	target string
	mu     sync.Mutex
	conns  map[net.Conn]bool
	wg     sync.WaitGroup
}

func newResetProxy(t *testing.T, target string) *resetProxy {
	t.Helper()
	ln, err := net.Listen("tcp", "127.0.0.1:0")
	if err != nil {
		t.Fatal(err)
	}
	p := &resetProxy{ln: ln, target: target, conns: map[net.Conn]bool{}}
	p.wg.Add(1)
	go p.accept()
	t.Cleanup(p.close)
	return p
}

func (p *resetProxy) url() string { return "nats://" + p.ln.Addr().String() }

func (p *resetProxy) accept() {
	defer p.wg.Done()
	for {
		c, err := p.ln.Accept()
		if err != nil {
			return
		}
		s, err := net.Dial("tcp", p.target)
		if err != nil {
			c.Close()
			continue
		}
		p.mu.Lock()
		p.conns[c], p.conns[s] = true, true
		p.mu.Unlock()
		p.wg.Add(2)
		pipe := func(dst, src net.Conn) {
			defer p.wg.Done()
			_, _ = io.Copy(dst, src)
			dst.Close()
			src.Close()
		}
		go pipe(s, c)
		go pipe(c, s)
	}
}

// reset closes every connection with a TCP reset (linger 0) and reports
// how many it closed.
func (p *resetProxy) reset() int {
	p.mu.Lock()
	defer p.mu.Unlock()
	n := 0
	for c := range p.conns {
		if tc, ok := c.(*net.TCPConn); ok {
			_ = tc.SetLinger(0)
		}
		c.Close()
		delete(p.conns, c)
		n++
	}
	return n
}

func (p *resetProxy) close() {
	p.ln.Close()
	p.reset()
	p.wg.Wait()
}

// TestService_ReconnectGap runs the service through a TCP proxy that
// resets its connection 8 times while 60,000 readings of 20 sensors,
// published with JetStream acknowledgements, stream in. Messages the
// server delivered while the client was away are lost in flight; the
// service must see the gap in the stream sequence and read them again.
// It checks applied == published, the stored position is the last
// sequence, and each sensor's fit is bit for bit that of the same
// readings added in order to a fresh rolling.Sensor (an uninterrupted
// run).
func TestService_ReconnectGap(t *testing.T) {
	if testing.Short() {
		t.Skip("streams 60,000 readings through connection resets")
	}
	dir := t.TempDir()
	ns := natsServer(t, filepath.Join(dir, "nats"), 0)
	defer ns.Shutdown()
	proxy := newResetProxy(t, ns.Addr().String())
	lg := zerolog.New(zerolog.NewTestWriter(t)).Level(zerolog.InfoLevel)
	h := startServiceWith(t, proxy.url(), dir, ingest.ModeStream, func(o *ingest.Options) { o.Logger = &lg })
	waitStream(t, h.nc)

	pub, err := nats.Connect(ns.ClientURL())
	if err != nil {
		t.Fatal(err)
	}
	defer pub.Close()
	js, err := pub.JetStream(nats.PublishAsyncMaxPending(4096))
	if err != nil {
		t.Fatal(err)
	}
	const sensors, perSensor = 20, 3000
	base := time.Now().Add(-23 * time.Hour).Truncate(time.Hour)
	value := func(i int) float64 { return 100 + 0.001*float64(i) + float64(i%13)*0.01 }
	done := make(chan error, 1)
	go func() {
		for i := range perSensor {
			at := base.Add(time.Duration(i) * 20 * time.Second)
			for k := range sensors {
				payload := fmt.Appendf(nil, `{"t":%d,"v":%v}`, at.Unix(), value(i+k))
				// Wait out a stall of unacknowledged publishes; nothing
				// else may fail.
				for {
					_, err := js.PublishAsync(fmt.Sprintf("driftfit.in.qm.gap.pt-%d", k), payload)
					if err == nil {
						break
					}
					if !errors.Is(err, nats.ErrTooManyStalledMsgs) {
						done <- err
						return
					}
					<-js.PublishAsyncComplete()
				}
			}
		}
		select {
		case <-js.PublishAsyncComplete():
			done <- nil
		case <-time.After(60 * time.Second):
			done <- fmt.Errorf("%d publishes not acknowledged", js.PublishAsyncPending())
		}
	}()
	// Reset whenever the service has taken another stretch of readings,
	// so each reset falls while messages are in flight to it.
	resets := 0
	t0 := time.Now()
	for resets < 8 {
		target := uint64(resets+1) * sensors * perSensor / 10
		deadline := time.Now().Add(20 * time.Second)
		for h.svc.Stats().Applied < target {
			if time.Now().After(deadline) {
				ci, err := js.ConsumerInfo("DRIFTFIT", "driftfit")
				if err == nil {
					t.Fatalf("stuck: consumer delivered %+v ackfloor %+v pending %d ackpending %d waiting %d; stats %+v connected %v", ci.Delivered, ci.AckFloor, ci.NumPending, ci.NumAckPending, ci.NumWaiting, h.svc.Stats(), h.nc.IsConnected())
				}
				t.Fatal(err)
			}
			time.Sleep(10 * time.Millisecond)
		}
		if proxy.reset() > 0 {
			resets++
			t.Logf("reset %d at %d applied, after %v", resets, h.svc.Stats().Applied, time.Since(t0).Round(time.Millisecond))
		}
	}
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	const want = sensors * perSensor
	waitFor(t, "every reading applied", func() bool { return h.svc.Stats().Applied >= want })
	time.Sleep(100 * time.Millisecond) // let a double count show, if there were one
	if st := h.svc.Stats(); st.Applied != want || st.Rejected != 0 {
		t.Fatalf("applied %d, rejected %d; want %d, 0", st.Applied, st.Rejected, want)
	}
	h.stop()

	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{ReadOnly: true})
	if err != nil {
		t.Fatal(err)
	}
	defer db.Close()
	if pos, err := db.Position(); err != nil || pos != want {
		t.Errorf("stored position %d (%v), want %d", pos, err, want)
	}
	spec := rolling.WindowSpec{Span: 24 * time.Hour, Pane: time.Hour}
	got := map[string]rolling.Solution{}
	err = db.Restore(func(string) (*rolling.Sensor, error) { return rolling.NewSensor(spec) }, func(r store.Restored) error {
		got[r.ID] = r.Sensor.Solve(0)
		return nil
	})
	if err != nil {
		t.Fatal(err)
	}
	for k := range sensors {
		ref, err := rolling.NewSensor(spec)
		if err != nil {
			t.Fatal(err)
		}
		for i := range perSensor {
			at := base.Add(time.Duration(i) * 20 * time.Second)
			if err := ref.Add(rolling.Reading{UnixNano: at.UnixNano(), Value: value(i + k)}); err != nil {
				t.Fatal(err)
			}
		}
		id := fmt.Sprintf("qm.gap.pt-%d", k)
		w, g := ref.Solve(0), got[id]
		if g.N != w.N || math.Float64bits(g.Line.Coef[1]) != math.Float64bits(w.Line.Coef[1]) || math.Float64bits(g.Line.Coef[0]) != math.Float64bits(w.Line.Coef[0]) {
			t.Errorf("%s: n %d slope %v level %v; uninterrupted n %d slope %v level %v", id, g.N, g.Line.Coef[1], g.Line.Coef[0], w.N, w.Line.Coef[1], w.Line.Coef[0])
		}
	}
	t.Logf("refetches %v", counterValue(t, h.m.StreamRefetch))
}
