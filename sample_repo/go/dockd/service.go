package dockd

import (
	"bytes"
	"context"
	"encoding/json"
	"fmt"
	"io"
	"log"
	"net/http"
	"sort"
	"sync"
	"time"
)

// HeartbeatTracker remembers when each dock last reported in.
type HeartbeatTracker struct {
	mu       sync.Mutex
	lastSeen map[uint16]time.Time
	timeout  time.Duration
	now      func() time.Time
}

// NewHeartbeatTracker creates a tracker that treats docks as offline after timeout.
func NewHeartbeatTracker(timeout time.Duration) *HeartbeatTracker {
	return &HeartbeatTracker{lastSeen: make(map[uint16]time.Time), timeout: timeout, now: time.Now}
}

// Seen records that a packet from the dock has just arrived.
func (h *HeartbeatTracker) Seen(dockID uint16) {
	h.mu.Lock()
	defer h.mu.Unlock()
	h.lastSeen[dockID] = h.now()
}

// Silent returns the IDs of docks whose last heartbeat is older than the timeout, sorted.
func (h *HeartbeatTracker) Silent() []uint16 {
	h.mu.Lock()
	defer h.mu.Unlock()
	cutoff := h.now().Add(-h.timeout)
	var ids []uint16
	for id, seen := range h.lastSeen {
		if seen.Before(cutoff) {
			ids = append(ids, id)
		}
	}
	sort.Slice(ids, func(i, j int) bool { return ids[i] < ids[j] })
	return ids
}

// Pager delivers a message to whoever is on call.
type Pager interface {
	Page(ctx context.Context, subject, body string) error
}

// AlertNotifier sends operational alerts about docks without flooding the on-call rota.
type AlertNotifier struct {
	mu       sync.Mutex
	pager    Pager
	cooldown time.Duration
	lastSent map[uint16]time.Time
}

// NewAlertNotifier returns a notifier that alerts at most once per dock per cooldown.
func NewAlertNotifier(p Pager, cooldown time.Duration) *AlertNotifier {
	return &AlertNotifier{pager: p, cooldown: cooldown, lastSent: make(map[uint16]time.Time)}
}

// NotifyLowBattery pages the on-call operations team when a dock running on its
// backup power cell is close to going flat. It sends at most one page per dock
// per cooldown period and reports whether a page was sent.
func (a *AlertNotifier) NotifyLowBattery(ctx context.Context, s *DockStatus, thresholdMV uint16) (bool, error) {
	if !s.BatteryLow(thresholdMV) {
		return false, nil
	}
	a.mu.Lock()
	last, ok := a.lastSent[s.DockID]
	if ok && time.Since(last) < a.cooldown {
		a.mu.Unlock()
		return false, nil
	}
	a.lastSent[s.DockID] = time.Now()
	a.mu.Unlock()
	subject := fmt.Sprintf("dock %d backup power low", s.DockID)
	body := fmt.Sprintf("dock %d reports %d mV at %s", s.DockID, s.BatteryMV, s.SentAt.Format(time.RFC3339))
	if err := a.pager.Page(ctx, subject, body); err != nil {
		return false, err
	}
	return true, nil
}

// BatchBuffer collects decoded statuses until enough have arrived to ship a batch.
type BatchBuffer struct {
	mu      sync.Mutex
	items   []*DockStatus
	maxSize int
	sink    func(ctx context.Context, batch []byte) error
}

// NewBatchBuffer returns a buffer that hands every maxSize statuses to sink as one batch.
func NewBatchBuffer(maxSize int, sink func(ctx context.Context, batch []byte) error) *BatchBuffer {
	return &BatchBuffer{maxSize: maxSize, sink: sink}
}

// Add appends a status and flushes automatically once the buffer is full.
func (b *BatchBuffer) Add(ctx context.Context, s *DockStatus) error {
	b.mu.Lock()
	b.items = append(b.items, s)
	full := len(b.items) >= b.maxSize
	b.mu.Unlock()
	if full {
		return b.Flush(ctx)
	}
	return nil
}

// Flush serialises the buffered statuses as JSON lines and hands them to the sink.
func (b *BatchBuffer) Flush(ctx context.Context) error {
	b.mu.Lock()
	items := b.items
	b.items = nil
	b.mu.Unlock()
	if len(items) == 0 {
		return nil
	}
	var buf bytes.Buffer
	enc := json.NewEncoder(&buf)
	for _, s := range items {
		if err := enc.Encode(s); err != nil {
			return err
		}
	}
	return b.sink(ctx, buf.Bytes())
}

// Server is the HTTP front end the radio gateways post raw packets to.
type Server struct {
	Heartbeats *HeartbeatTracker
	Alerts     *AlertNotifier
	Batches    *BatchBuffer
	LowBattMV  uint16
}

// ServeHTTP accepts a body of concatenated 12-byte packets from one gateway.
func (srv *Server) ServeHTTP(w http.ResponseWriter, r *http.Request) {
	if r.Method != http.MethodPost {
		http.Error(w, "method not allowed", http.StatusMethodNotAllowed)
		return
	}
	body, err := io.ReadAll(io.LimitReader(r.Body, 1<<20))
	if err != nil {
		http.Error(w, "read error", http.StatusBadRequest)
		return
	}
	accepted := srv.ingest(r.Context(), body)
	w.Header().Set("Content-Type", "application/json")
	fmt.Fprintf(w, "{\"accepted\":%d}\n", accepted)
}

func (srv *Server) ingest(ctx context.Context, body []byte) int {
	accepted := 0
	for off := 0; off+packetLen <= len(body); off += packetLen {
		status, err := DecodeStatusPacket(body[off : off+packetLen])
		if err != nil {
			log.Printf("dockd: dropping packet at offset %d: %v", off, err)
			continue
		}
		srv.Heartbeats.Seen(status.DockID)
		if _, err := srv.Alerts.NotifyLowBattery(ctx, status, srv.LowBattMV); err != nil {
			log.Printf("dockd: paging failed: %v", err)
		}
		if err := srv.Batches.Add(ctx, status); err != nil {
			log.Printf("dockd: batch flush failed: %v", err)
		}
		accepted++
	}
	return accepted
}
