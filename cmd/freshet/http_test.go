package main

import (
	"context"
	"encoding/json"
	"io"
	"net/http"
	"strings"
	"testing"
	"time"

	"go.uber.org/zap"

	"freshet.dev/freshet/config"
)

func httpGet(t *testing.T, url string) (int, string) {
	t.Helper()
	resp, err := http.Get(url)
	if err != nil {
		t.Fatal(err)
	}
	defer resp.Body.Close()
	b, err := io.ReadAll(resp.Body)
	if err != nil {
		t.Fatal(err)
	}
	return resp.StatusCode, string(b)
}

// TestHTTPEndpoints runs a finite demo with the HTTP server on and checks
// that /readyz turns ready while training and unready once the trainer has
// stopped, and that /status and /metrics report the events applied.
func TestHTTPEndpoints(t *testing.T) {
	const events = 20000
	cfg := config.Default()
	cfg.DataDir = t.TempDir()
	cfg.Source.Scenario.Events = events
	cfg.Source.Scenario.Rate = 10000 // two seconds of training to look at
	d, err := openDaemon(context.Background(), cfg, zap.NewNop())
	if err != nil {
		t.Fatal(err)
	}
	defer d.close()
	addr, stop, err := serveHTTP("127.0.0.1:0", d, zap.NewNop())
	if err != nil {
		t.Fatal(err)
	}
	defer stop()
	base := "http://" + addr

	if code, _ := httpGet(t, base+"/readyz"); code != http.StatusServiceUnavailable {
		t.Errorf("/readyz before training: %d, want 503", code)
	}
	done := make(chan error, 1)
	go func() { done <- d.trainer.Run(context.Background()) }()
	ready := false
	for deadline := time.Now().Add(10 * time.Second); time.Now().Before(deadline) && !ready; time.Sleep(20 * time.Millisecond) {
		code, _ := httpGet(t, base+"/readyz")
		ready = code == http.StatusOK
	}
	if !ready {
		t.Fatal("/readyz never became ready while training")
	}
	if err := <-done; err != nil {
		t.Fatal(err)
	}
	if code, body := httpGet(t, base+"/healthz"); code != http.StatusOK || body != "ok\n" {
		t.Errorf("/healthz: %d %q", code, body)
	}
	if code, _ := httpGet(t, base+"/readyz"); code != http.StatusServiceUnavailable {
		t.Errorf("/readyz after the trainer stopped: %d, want 503", code)
	}
	_, body := httpGet(t, base+"/status")
	var page statusPage
	if err := json.Unmarshal([]byte(body), &page); err != nil {
		t.Fatalf("/status is not JSON: %v\n%s", err, body)
	}
	if page.Trainer.Counts.Applied != events || page.Trainer.Position.Offset != events || page.Trainer.Durable != page.Trainer.Seq {
		t.Errorf("/status: applied %d, position %d, durable %d of %d; want %d, %d, all durable",
			page.Trainer.Counts.Applied, page.Trainer.Position.Offset, page.Trainer.Durable, page.Trainer.Seq, events, events)
	}
	_, body = httpGet(t, base+"/metrics")
	for _, want := range []string{
		`freshet_trainer_events_total{result="applied"} 20000`,
		`freshet_online_prequential_events_total 20000`,
		`freshet_online_prequential_rmse{window="fading"}`,
		`freshet_online_drift_alarms_total{detector="page_hinkley"}`,
	} {
		if !strings.Contains(body, want) {
			t.Errorf("/metrics lacks %q", want)
		}
	}
}
