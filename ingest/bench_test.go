package ingest_test

import (
	"context"
	"fmt"
	"math"
	"path/filepath"
	"strconv"
	"sync/atomic"
	"syscall"
	"testing"
	"time"

	"github.com/nats-io/nats-server/v2/server"
	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"driftfit/ingest"
	"driftfit/rolling"
	"driftfit/store"
)

// BenchmarkService_Direct measures the per-reading path of a running
// service in direct mode: NATS delivery, decode, validate, hand-off to the
// workers and the windows (1d/1h and 30d/1d) of 10,000 sensors, with
// commits running beside it (fsync off, so the disk does not set the
// pace). One op is one reading; the publisher stays at most 50,000
// messages ahead, so nothing is dropped.
func BenchmarkService_Direct(b *testing.B) {
	for _, per := range []int{1, 100} {
		b.Run("per_msg="+strconv.Itoa(per), func(b *testing.B) {
			dir, ns, nc := benchBus(b)
			pub, err := nats.Connect(ns.ClientURL())
			if err != nil {
				b.Fatal(err)
			}
			defer pub.Close()
			svc := benchService(b, nc, dir, ingest.ModeDirect)
			ctx, cancel := context.WithCancel(context.Background())
			done := make(chan error, 1)
			go func() { done <- svc.Run(ctx) }()
			defer func() {
				cancel()
				if err := <-done; err != nil {
					b.Error(err)
				}
			}()

			const sensors = 10000
			end := time.Now().Add(-time.Minute).Truncate(time.Second)
			subjects := make([]string, sensors)
			payloads := make([][]byte, sensors)
			rs := make([]rolling.Reading, per)
			for i := range sensors {
				subjects[i] = fmt.Sprintf("driftfit.in.bench.s%04d", i)
				for j := range rs {
					rs[j] = rolling.Reading{UnixNano: end.Add(-time.Duration(per-j) * time.Second).UnixNano(), Value: 100 + float64(i%7) + float64(j)*0.01}
				}
				if per == 1 {
					payloads[i] = ingest.AppendReading(nil, ingest.Decoded{Reading: rs[0]})
				} else {
					payloads[i] = ingest.AppendBatch(nil, subjects[i][len("driftfit.in."):], rs)
				}
			}
			// Core NATS keeps nothing for late subscribers: probe until live.
			waitFor(b, "subscription", func() bool {
				_ = pub.Publish(subjects[0], payloads[0])
				_ = pub.Flush()
				return svc.Stats().Applied > 0
			})
			base := svc.Stats()
			msgs := (b.N + per - 1) / per
			b.ReportAllocs()
			b.ResetTimer()
			for k := range msgs {
				// A late probe may count as taken: clamp, do not wrap.
				for stuck := time.Now(); k&255 == 0 && uint64(k)-min(uint64(k), svc.Stats().Messages-base.Messages) > 50000; {
					time.Sleep(50 * time.Microsecond)
					if time.Since(stuck) > 10*time.Second {
						b.Fatalf("after %d messages sent, %+v taken; server slow consumers %d", k, svc.Stats(), ns.NumSlowConsumers())
					}
				}
				if err := pub.Publish(subjects[k%sensors], payloads[k%sensors]); err != nil {
					b.Fatal(err)
				}
			}
			want := base.Applied + uint64(msgs*per)
			waitFor(b, "readings applied", func() bool { return svc.Stats().Applied >= want })
			b.StopTimer()
			b.ReportMetric(float64(msgs*per)/b.Elapsed().Seconds(), "readings/s")
		})
	}
}

// benchBus starts a NATS server with JetStream in a new temporary
// directory and connects to it; both close with the benchmark.
func benchBus(b *testing.B) (dir string, ns *server.Server, nc *nats.Conn) {
	b.Helper()
	dir = b.TempDir()
	ns = natsServer(b, filepath.Join(dir, "nats"), 0)
	b.Cleanup(ns.Shutdown)
	nc, err := nats.Connect(ns.ClientURL())
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(nc.Close)
	return dir, ns, nc
}

// benchService makes a service on nc in mode with a state file in dir
// (fsync off, so the disk does not set the pace), for sensors with the
// default windows (1d/1h and 30d/1d). The file closes with the benchmark.
func benchService(b *testing.B, nc *nats.Conn, dir string, mode ingest.Mode) *ingest.Service {
	b.Helper()
	db, err := store.Open(filepath.Join(dir, "state.db"), store.Options{NoSync: true})
	if err != nil {
		b.Fatal(err)
	}
	b.Cleanup(func() { db.Close() })
	svc, err := ingest.New(ingest.Options{
		Conn: nc, DB: db, Mode: mode,
		// The benchmarks send one set of readings over and over.
		AcceptDuplicates: true,
		Sensor: func(string) (ingest.SensorConfig, error) {
			return ingest.SensorConfig{Windows: []rolling.WindowSpec{{Span: 24 * time.Hour, Pane: time.Hour}, {Span: 30 * 24 * time.Hour, Pane: 24 * time.Hour}}}, nil
		},
	})
	if err != nil {
		b.Fatal(err)
	}
	return svc
}

// BenchmarkService_Stream measures draining a JetStream stream that
// already holds the readings, in 100-reading batches for 10,000 sensors,
// values printed in full as a producer prints a float64. ack-only is the
// baseline: a consumer that acknowledges each message and does nothing
// else. service is the consumer's delivery, decode, validate, the windows
// (1d/1h and 30d/1d), commits (fsync off) and acknowledgements. One op is
// one reading; "cores" is the CPU time of the process over the time
// measured.
func BenchmarkService_Stream(b *testing.B) {
	for _, consumer := range []string{"ack-only", "service"} {
		b.Run("consumer="+consumer, func(b *testing.B) { benchStream(b, consumer == "service") })
	}
}

func benchStream(b *testing.B, service bool) {
	const sensors, per = 10000, 100
	dir, _, nc := benchBus(b)
	js, err := jetstream.New(nc, jetstream.WithPublishAsyncMaxPending(4096))
	if err != nil {
		b.Fatal(err)
	}
	ctx := context.Background()
	if _, err := js.CreateStream(ctx, jetstream.StreamConfig{Name: "DRIFTFIT", Subjects: []string{"driftfit.in.>"}, Storage: jetstream.FileStorage}); err != nil {
		b.Fatal(err)
	}
	end := time.Now().Add(-time.Minute).Truncate(time.Second)
	rs := make([]rolling.Reading, per)
	msgs := (b.N + per - 1) / per
	rounds := msgs/sensors + 1
	for k := range msgs {
		i, round := k%sensors, k/sensors
		for j := range rs {
			// Each round of a sensor's batches lies after the last.
			at := end.Add(-time.Duration((rounds-round)*per-j) * time.Second)
			rs[j] = rolling.Reading{UnixNano: at.UnixNano(), Value: 100 + float64(i%7) + float64(j)*0.01*math.Pi}
		}
		id := fmt.Sprintf("bench.s%04d", i)
		if _, err := js.PublishAsync("driftfit.in."+id, ingest.AppendBatch(nil, id, rs)); err != nil {
			b.Fatal(err)
		}
	}
	select {
	case <-js.PublishAsyncComplete():
	case <-time.After(time.Minute):
		b.Fatal("stream fill not acknowledged")
	}
	var ru0, ru1 syscall.Rusage
	measure := func(run func()) {
		b.ReportAllocs()
		_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru0)
		b.ResetTimer()
		run()
		b.StopTimer()
		_ = syscall.Getrusage(syscall.RUSAGE_SELF, &ru1)
		cpu := time.Duration(ru1.Utime.Nano() + ru1.Stime.Nano() - ru0.Utime.Nano() - ru0.Stime.Nano())
		b.ReportMetric(cpu.Seconds()/b.Elapsed().Seconds(), "cores")
		b.ReportMetric(float64(msgs*per)/b.Elapsed().Seconds(), "readings/s")
	}

	if !service {
		cons, err := js.CreateConsumer(ctx, "DRIFTFIT", jetstream.ConsumerConfig{Durable: "ack", AckPolicy: jetstream.AckExplicitPolicy, MaxAckPending: 1 << 16})
		if err != nil {
			b.Fatal(err)
		}
		var got atomic.Int64
		measure(func() {
			cc, err := cons.Consume(func(m jetstream.Msg) { _ = m.Ack(); got.Add(1) }, jetstream.PullMaxMessages(2048))
			if err != nil {
				b.Fatal(err)
			}
			defer cc.Stop()
			waitFor(b, "messages acknowledged", func() bool { return got.Load() >= int64(msgs) })
		})
		return
	}

	svc := benchService(b, nc, dir, ingest.ModeStream)
	runCtx, cancel := context.WithCancel(ctx)
	done := make(chan error, 1)
	measure(func() {
		go func() { done <- svc.Run(runCtx) }()
		want := uint64(msgs * per)
		waitFor(b, "readings applied", func() bool { return svc.Stats().Applied >= want })
	})
	cancel()
	if err := <-done; err != nil {
		b.Fatal(err)
	}
	if st := svc.Stats(); st.Rejected != 0 {
		b.Fatalf("%d readings rejected", st.Rejected)
	}
}
