package main

import (
	"context"
	"encoding/json"
	"errors"
	"net"
	"net/http"
	"strconv"
	"time"

	"github.com/prometheus/client_golang/prometheus"
	"github.com/prometheus/client_golang/prometheus/collectors"
	"github.com/prometheus/client_golang/prometheus/promhttp"
	"go.uber.org/zap"

	"freshet.dev/freshet/online"
	"freshet.dev/freshet/sink/serving"
)

// statusPage is what /status serves: plain data from the components'
// Status methods.
type statusPage struct {
	Trainer online.TrainerStatus `json:"trainer"`
	Redis   *serving.Status      `json:"redis,omitempty"`
	Lag     []partitionLag       `json:"lag,omitempty"`
}

type partitionLag struct {
	Partition int32 `json:"partition"`
	Lag       int64 `json:"lag"`
}

// lagger is the Kafka source's per-partition lag, seen through an interface
// so that the HTTP code does not depend on the source's type.
type lagger interface {
	LagPartitions() (partitions []int32, lags []int64)
}

func (d *daemon) status() statusPage {
	p := statusPage{Trainer: d.trainer.Status()}
	if d.writer != nil {
		st := d.writer.Status()
		p.Redis = &st
	}
	if l, ok := d.source.(lagger); ok {
		parts, lags := l.LagPartitions()
		for i := range parts {
			p.Lag = append(p.Lag, partitionLag{parts[i], lags[i]})
		}
	}
	return p
}

// serveHTTP serves /healthz (the process is up), /readyz (training, not
// draining), /status (JSON) and /metrics (Prometheus) on addr, and returns
// the address it listens on and a function that shuts the server down.
func serveHTTP(addr string, d *daemon, log *zap.Logger) (bound string, stop func(), err error) {
	reg := prometheus.NewRegistry()
	if err := reg.Register(&metrics{d: d}); err != nil {
		return "", nil, err
	}
	reg.MustRegister(collectors.NewGoCollector(), collectors.NewProcessCollector(collectors.ProcessCollectorOpts{}))
	mux := http.NewServeMux()
	mux.HandleFunc("GET /healthz", func(w http.ResponseWriter, r *http.Request) {
		w.Write([]byte("ok\n"))
	})
	mux.HandleFunc("GET /readyz", func(w http.ResponseWriter, r *http.Request) {
		st := d.trainer.Status()
		if !st.Running || st.Draining {
			http.Error(w, "not ready", http.StatusServiceUnavailable)
			return
		}
		w.Write([]byte("ready\n"))
	})
	mux.HandleFunc("GET /status", func(w http.ResponseWriter, r *http.Request) {
		w.Header().Set("Content-Type", "application/json")
		enc := json.NewEncoder(w)
		enc.SetIndent("", "  ")
		enc.Encode(d.status())
	})
	mux.Handle("GET /metrics", promhttp.HandlerFor(reg, promhttp.HandlerOpts{}))
	ln, err := net.Listen("tcp", addr)
	if err != nil {
		return "", nil, usagef("http.listen %q: %v", addr, err)
	}
	srv := &http.Server{Handler: mux, ReadHeaderTimeout: 5 * time.Second}
	done := make(chan struct{})
	go func() {
		defer close(done)
		if err := srv.Serve(ln); err != nil && !errors.Is(err, http.ErrServerClosed) {
			log.Error("http server", zap.Error(err))
		}
	}()
	log.Info("http listening", zap.String("addr", ln.Addr().String()))
	return ln.Addr().String(), func() {
		sctx, cancel := context.WithTimeout(context.Background(), 2*time.Second)
		defer cancel()
		srv.Shutdown(sctx)
		<-done
	}, nil
}

// metrics exports the components' Status as Prometheus metrics, computed at
// scrape time (no label carries a user or item ID).
type metrics struct{ d *daemon }

var (
	mEvents = prometheus.NewDesc("freshet_trainer_events_total",
		"Events by outcome: applied, rejected (bad records set aside), refused (erased IDs, row caps), non_finite (steps undone), erased.",
		[]string{"result"}, nil)
	mRows        = prometheus.NewDesc("freshet_trainer_rows", "Live rows per side of the model.", []string{"side"}, nil)
	mSeq         = prometheus.NewDesc("freshet_trainer_cut_seq", "Newest cut taken (taken) and made durable (durable).", []string{"state"}, nil)
	mModelTime   = prometheus.NewDesc("freshet_trainer_model_time_seconds", "Event time of the newest event applied.", nil, nil)
	mRate        = prometheus.NewDesc("freshet_trainer_events_per_second", "Events applied per second over the last progress interval.", nil, nil)
	mRMSE        = prometheus.NewDesc("freshet_online_prequential_rmse", "Prequential RMSE (test-then-train).", []string{"window"}, nil)
	mMAE         = prometheus.NewDesc("freshet_online_prequential_mae", "Prequential MAE (test-then-train).", []string{"window"}, nil)
	mRecall      = prometheus.NewDesc("freshet_online_prequential_recall", "Prequential recall@N of sampled evaluations.", []string{"window"}, nil)
	mSqErr       = prometheus.NewDesc("freshet_online_prequential_squared_error_total", "Sum of squared prequential errors; RMSE over a range is sqrt(rate of this / rate of events).", nil, nil)
	mPreqEvents  = prometheus.NewDesc("freshet_online_prequential_events_total", "Events scored before learning.", nil, nil)
	mCold        = prometheus.NewDesc("freshet_online_cold_start_ratio", "Share of events whose user or item was unseen.", nil, nil)
	mAlarms      = prometheus.NewDesc("freshet_online_drift_alarms_total", "Drift alarms by detector.", []string{"detector"}, nil)
	mPH          = prometheus.NewDesc("freshet_online_page_hinkley_statistic", "Current Page-Hinkley statistic m_t - M_t (alarm above lambda).", nil, nil)
	mSnapStall   = prometheus.NewDesc("freshet_trainer_snapshot_stall_seconds", "Longest batch-boundary pause during the last snapshot.", nil, nil)
	mSnapTook    = prometheus.NewDesc("freshet_trainer_snapshot_duration_seconds", "Wall time of the last snapshot, start to commit.", nil, nil)
	mLag         = prometheus.NewDesc("freshet_stream_kafka_lag_messages", "Messages between the partition's end and the next offset handed to the trainer.", []string{"partition"}, nil)
	mRedisUp     = prometheus.NewDesc("freshet_sink_redis_degraded", "1 while the last Redis flush failed.", nil, nil)
	mRedisPend   = prometheus.NewDesc("freshet_sink_redis_pending_rows", "Rows waiting to be written to Redis.", nil, nil)
	mRedisVec    = prometheus.NewDesc("freshet_sink_redis_vectors_written_total", "Vectors acknowledged by Redis.", nil, nil)
	mRedisVer    = prometheus.NewDesc("freshet_sink_redis_version", "Current published serving version.", nil, nil)
	mRedisLoss   = prometheus.NewDesc("freshet_sink_redis_data_losses_total", "Times Redis was found to have lost its data.", nil, nil)
	mRedisFresh  = prometheus.NewDesc("freshet_sink_redis_freshness_seconds", "Time from a row's change to Redis acknowledging it, quantiles over the run.", []string{"quantile"}, nil)
	allMetricsDs = []*prometheus.Desc{mEvents, mRows, mSeq, mModelTime, mRate, mRMSE, mMAE, mRecall, mSqErr, mPreqEvents,
		mCold, mAlarms, mPH, mSnapStall, mSnapTook, mLag, mRedisUp, mRedisPend, mRedisVec, mRedisVer, mRedisLoss, mRedisFresh}
)

func (m *metrics) Describe(ch chan<- *prometheus.Desc) {
	for _, d := range allMetricsDs {
		ch <- d
	}
}

func (m *metrics) Collect(ch chan<- prometheus.Metric) {
	p := m.d.status()
	t := p.Trainer
	c, g := prometheus.CounterValue, prometheus.GaugeValue
	emit := func(d *prometheus.Desc, typ prometheus.ValueType, v float64, labels ...string) {
		ch <- prometheus.MustNewConstMetric(d, typ, v, labels...)
	}
	emit(mEvents, c, float64(t.Counts.Applied), "applied")
	emit(mEvents, c, float64(t.Counts.Rejected), "rejected")
	emit(mEvents, c, float64(t.Counts.Refused), "refused")
	emit(mEvents, c, float64(t.Counts.NonFinite), "non_finite")
	emit(mEvents, c, float64(t.Counts.Erased), "erased")
	emit(mRows, g, float64(t.Users), "user")
	emit(mRows, g, float64(t.Items), "item")
	emit(mSeq, g, float64(t.Seq), "taken")
	emit(mSeq, g, float64(t.Durable), "durable")
	emit(mModelTime, g, float64(t.Time)/1000)
	emit(mRate, g, t.EventsPerS)
	ms := t.Monitor
	emit(mRMSE, g, ms.RMSEFading, "fading")
	emit(mRMSE, g, ms.RMSEWindow, "sliding")
	emit(mMAE, g, ms.MAEFading, "fading")
	emit(mMAE, g, ms.MAEWindow, "sliding")
	emit(mRecall, g, ms.RecallFading, "fading")
	emit(mRecall, g, ms.RecallWindow, "sliding")
	emit(mSqErr, c, ms.SquaredErrorTotal)
	emit(mPreqEvents, c, float64(ms.Events))
	emit(mCold, g, ms.ColdEitherShare)
	emit(mAlarms, c, float64(ms.PHAlarms), "page_hinkley")
	emit(mAlarms, c, float64(ms.ADWINAlarms), "adwin")
	emit(mPH, g, ms.PHStat)
	emit(mSnapStall, g, t.LastSnapshot.StallMax.Seconds())
	emit(mSnapTook, g, t.LastSnapshot.Took.Seconds())
	for _, l := range p.Lag {
		emit(mLag, g, float64(l.Lag), strconv.Itoa(int(l.Partition)))
	}
	if r := p.Redis; r != nil {
		deg := 0.0
		if r.Degraded {
			deg = 1
		}
		emit(mRedisUp, g, deg)
		emit(mRedisPend, g, float64(r.Pending))
		emit(mRedisVec, c, float64(r.VectorsWritten))
		emit(mRedisVer, g, float64(r.Version))
		emit(mRedisLoss, c, float64(r.DataLosses))
		emit(mRedisFresh, g, r.FreshP50.Seconds(), "0.5")
		emit(mRedisFresh, g, r.FreshP99.Seconds(), "0.99")
	}
}
