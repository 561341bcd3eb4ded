package ingest

import (
	"encoding/json"
	"sync"
	"sync/atomic"
	"time"

	"github.com/prometheus/client_golang/prometheus"

	"driftfit/alert"
)

// ticketIndex holds the due dates of the open tickets, so that the
// metrics can count the overdue ones at any moment: a ticket's stored
// Overdue flag is set only when its window is judged again, which a
// sensor that stopped reporting never is. Workers update it as they
// decide, before the commit that stores the decision; it is safe for
// concurrent use.
type ticketIndex struct {
	mu  sync.Mutex
	due map[string]time.Time // ticket id → due date
}

func newTicketIndex() *ticketIndex { return &ticketIndex{due: map[string]time.Time{}} }

// set records tk's latest revision: open with its due date, or closed.
func (x *ticketIndex) set(tk *alert.Ticket) {
	x.mu.Lock()
	defer x.mu.Unlock()
	if tk.Calibration != nil {
		delete(x.due, tk.ID)
		return
	}
	x.due[tk.ID] = tk.Due
}

// load records a stored ticket from its JSON, as set does.
func (x *ticketIndex) load(data []byte) error {
	var tk alert.Ticket
	if err := json.Unmarshal(data, &tk); err != nil {
		return err
	}
	x.set(&tk)
	return nil
}

// count returns the open tickets and how many of them are due before
// now.
func (x *ticketIndex) count(now time.Time) (open, overdue int) {
	x.mu.Lock()
	defer x.mu.Unlock()
	for _, d := range x.due {
		if now.After(d) {
			overdue++
		}
	}
	return len(x.due), overdue
}

// ticketGauges is the collector of driftfit_tickets_open and
// driftfit_tickets_overdue, counted from the running service's index at
// each scrape (zero before a service runs).
type ticketGauges struct {
	open, overdue *prometheus.Desc
	src           atomic.Pointer[ticketSource]
}

type ticketSource struct {
	idx *ticketIndex
	now func() time.Time
}

func newTicketGauges() *ticketGauges {
	return &ticketGauges{
		open:    prometheus.NewDesc("driftfit_tickets_open", "Open recalibration tickets.", nil, nil),
		overdue: prometheus.NewDesc("driftfit_tickets_overdue", "Open recalibration tickets whose due date has passed.", nil, nil),
	}
}

func (g *ticketGauges) Describe(ch chan<- *prometheus.Desc) { ch <- g.open; ch <- g.overdue }

func (g *ticketGauges) Collect(ch chan<- prometheus.Metric) {
	var open, overdue int
	if s := g.src.Load(); s != nil {
		open, overdue = s.idx.count(s.now())
	}
	ch <- prometheus.MustNewConstMetric(g.open, prometheus.GaugeValue, float64(open))
	ch <- prometheus.MustNewConstMetric(g.overdue, prometheus.GaugeValue, float64(overdue))
}
