package kafka

import (
	"context"
	"errors"
	"fmt"
	"io"
	"net"
	"slices"
	"strconv"
	"sync"
	"time"

	kgo "github.com/segmentio/kafka-go"
	"go.uber.org/zap"

	"freshet.dev/freshet/stream"
)

// idleEvery is how long Next waits before it returns an empty batch, so an idle
// trainer still flushes on time.
const idleEvery = 500 * time.Millisecond

// PartitionLag is one assigned partition's progress.
type PartitionLag struct {
	Partition int32
	// Next is the next offset the trainer has not been handed.
	Next int64
	// HighWaterMark is the partition's end offset at the latest fetch
	// (-1 before the first fetch).
	HighWaterMark int64
	// Lag is HighWaterMark − Next (0 before the first fetch).
	Lag int64
}

// Stats counts what a Source has done since New.
type Stats struct {
	Records      int64 // records read and handed over (events + rejects)
	Events       int64 // records decoded
	Rejected     int64 // records set aside
	DeadLettered int64 // dead-letter writes acknowledged
	Commits      int64 // successful commits
	CommitErrors int64 // failed commits (taken as lost ownership)
	Generations  int64 // generations joined
	Discarded    int64 // queued batches dropped at a rebalance (read again)
	Skipped      int64 // records lost to retention before they were read
}

// item is one Batch in flight with the worker's bookkeeping.
type item struct {
	b    stream.Batch
	seq  uint64 // the generation (local counter) whose worker filled it
	part int32
	next int64 // the partition's next offset after this batch
	hwm  int64
}

func (it *item) records() int { return len(it.b.Events) + it.b.Rejected }

// partState is what a Source knows of one partition it owns in the current
// generation.
type partState struct {
	hwm int64
}

// Source is a stream.Source reading one topic as a member of a consumer group.
// Next and Commit are called from one goroutine; Lag, Assignment and Stats are
// safe to call from any goroutine.
type Source struct {
	o      Options
	dialer *kgo.Dialer
	cg     *kgo.ConsumerGroup
	dl     *DeadLetter
	log    *zap.Logger

	ready chan *item
	free  chan *item
	fatal chan error
	err   error // the fatal error, once seen by Next
	cur   *item // handed to the trainer
	idle  *item
	timer *time.Timer

	decMu sync.Mutex // guards o.Decoder when no NewDecoder is given

	mu         sync.Mutex
	seq        uint64
	gen        *kgo.Generation
	owned      map[int32]*partState
	delivered  []stream.PartitionOffset // sorted; the trainer's position
	continuous map[int32]bool           // delivered[p] is this model's own, unbroken
	committed  map[int32]int64          // highest value known committed
	stats      Stats

	cancel    context.CancelFunc
	wg        sync.WaitGroup
	closeOnce sync.Once
}

// New joins the group and returns a Source that starts each assigned
// partition at its offset in from (a checkpoint's position; the zero Position
// for a new model), else at the group's committed offset, else at o.Start.
// The topics must exist (see EnsureTopics). Unless o.Shared is set, New
// refuses a group that already has active members.
func New(ctx context.Context, o Options, from stream.Position) (*Source, error) {
	o, err := o.withDefaults()
	if err != nil {
		return nil, err
	}
	if !from.IsZero() {
		if from.Source != "kafka" {
			return nil, fmt.Errorf("kafka: position: source %q is not kafka (the checkpoint comes from another source)", from.Source)
		}
		if from.Topic != o.Topic {
			return nil, fmt.Errorf("kafka: position: topic %q, but the source reads %q", from.Topic, o.Topic)
		}
		for i, po := range from.Partitions {
			if po.Next < 0 {
				return nil, fmt.Errorf("kafka: position: partitions[%d]: next offset %d is negative", i, po.Next)
			}
		}
	}
	client := &kgo.Client{Addr: kgo.TCP(o.Brokers...), Timeout: 10 * time.Second, Transport: o.Security.transport()}
	defer client.Transport.(*kgo.Transport).CloseIdleConnections()
	if err := checkTopics(ctx, client, o.Brokers, o.Topic, o.DeadLetterTopic); err != nil {
		return nil, err
	}
	if !o.Shared {
		if err := checkLease(ctx, client, o.GroupID, o.SessionTimeout+2*time.Second, o.Logger); err != nil {
			return nil, err
		}
	}

	s := &Source{
		o:          o,
		dialer:     o.dialer(),
		log:        o.Logger.With(zap.String("topic", o.Topic), zap.String("group", o.GroupID)),
		ready:      make(chan *item, o.QueueBatches),
		free:       make(chan *item, 4*o.QueueBatches+64),
		fatal:      make(chan error, 1),
		idle:       &item{},
		timer:      time.NewTimer(idleEvery),
		owned:      map[int32]*partState{},
		continuous: map[int32]bool{},
		committed:  map[int32]int64{},
	}
	for _, po := range from.Partitions {
		s.delivered = setNext(s.delivered, po.Partition, po.Next)
		s.continuous[po.Partition] = true
	}
	start := kgo.FirstOffset
	if o.Start == LastOffset {
		start = kgo.LastOffset
	}
	cg, err := kgo.NewConsumerGroup(kgo.ConsumerGroupConfig{
		ID:                o.GroupID,
		Brokers:           o.Brokers,
		Dialer:            s.dialer,
		Topics:            []string{o.Topic},
		SessionTimeout:    o.SessionTimeout,
		HeartbeatInterval: max(o.SessionTimeout/5, 200*time.Millisecond),
		RebalanceTimeout:  o.SessionTimeout,
		JoinGroupBackoff:  time.Second,
		StartOffset:       start,
		Timeout:           10 * time.Second,
	})
	if err != nil {
		return nil, fmt.Errorf("kafka: consumer group %q: %w", o.GroupID, err)
	}
	s.cg = cg
	s.dl = NewDeadLetter(o.Brokers, o.DeadLetterTopic, o.Topic, o.Security, o.DeadLetterQueue, s.log)
	runCtx, cancel := context.WithCancel(context.Background())
	s.cancel = cancel
	s.wg.Add(1)
	go func() {
		defer s.wg.Done()
		s.run(runCtx)
	}()
	return s, nil
}

// checkTopics fails unless both topics exist. It is also the first request,
// so bad credentials are reported here, once.
func checkTopics(ctx context.Context, client *kgo.Client, brokers []string, topics ...string) error {
	md, err := client.Metadata(ctx, &kgo.MetadataRequest{Topics: topics})
	if err != nil {
		return fmt.Errorf("kafka: metadata from %v: %w", brokers, err)
	}
	for _, want := range topics {
		i := slices.IndexFunc(md.Topics, func(t kgo.Topic) bool { return t.Name == want })
		if i < 0 || md.Topics[i].Error != nil || len(md.Topics[i].Partitions) == 0 {
			return fmt.Errorf("kafka: topic %q does not exist (create it first: EnsureTopics)", want)
		}
	}
	return nil
}

// checkLease refuses a group with active members. A member left behind by a
// crashed process expires after its session timeout, so members are polled
// for up to wait before the group is taken to be in use.
func checkLease(ctx context.Context, client *kgo.Client, group string, wait time.Duration, log *zap.Logger) error {
	deadline := time.Now().Add(wait)
	warned := false
	for {
		members, err := describeMembers(ctx, client, group)
		switch {
		case err != nil && coordinatorPending(err) && time.Now().Before(deadline):
			// A new broker creates its offsets topic on the first lookup.
		case err != nil:
			return fmt.Errorf("kafka: describing group %q: %w", group, err)
		case len(members) == 0:
			return nil
		case time.Now().After(deadline):
			hosts := make([]string, len(members))
			for i, m := range members {
				hosts[i] = m.ClientID + "@" + m.ClientHost
			}
			return fmt.Errorf("kafka: group %q already has %d active member(s) %v: another source is consuming for this model; stop it first, or use a new group ID",
				group, len(members), hosts)
		case !warned:
			log.Info("group has members; waiting one session timeout for them to expire",
				zap.String("group", group), zap.Int("members", len(members)))
			warned = true
		}
		select {
		case <-ctx.Done():
			return ctx.Err()
		case <-time.After(500 * time.Millisecond):
		}
	}
}

// describeMembers asks the group's coordinator for the group's members.
func describeMembers(ctx context.Context, client *kgo.Client, group string) ([]kgo.DescribeGroupsResponseMember, error) {
	fc, err := client.FindCoordinator(ctx, &kgo.FindCoordinatorRequest{Key: group, KeyType: kgo.CoordinatorKeyTypeConsumer})
	if err != nil {
		return nil, err
	}
	if fc.Error != nil {
		return nil, fc.Error
	}
	addr := kgo.TCP(net.JoinHostPort(fc.Coordinator.Host, strconv.Itoa(fc.Coordinator.Port)))
	resp, err := client.DescribeGroups(ctx, &kgo.DescribeGroupsRequest{Addr: addr, GroupIDs: []string{group}})
	if err != nil {
		return nil, err
	}
	for _, g := range resp.Groups {
		if g.GroupID == group {
			return g.Members, g.Error
		}
	}
	return nil, nil
}

// coordinatorPending reports whether err says the group coordinator is not
// ready yet (it comes up with the offsets topic).
func coordinatorPending(err error) bool {
	return errors.Is(err, kgo.NotCoordinatorForGroup) || errors.Is(err, kgo.GroupCoordinatorNotAvailable) ||
		errors.Is(err, kgo.GroupLoadInProgress)
}

// fail reports a fatal error to Next (the first one wins).
func (s *Source) fail(err error) {
	select {
	case s.fatal <- err:
	default:
	}
}

// fatalGroupError reports whether a group error can never clear by retrying.
func fatalGroupError(err error) bool {
	return errors.Is(err, kgo.SASLAuthenticationFailed) || errors.Is(err, kgo.InvalidSessionTimeout) ||
		errors.Is(err, kgo.GroupAuthorizationFailed) || errors.Is(err, kgo.TopicAuthorizationFailed) ||
		errors.Is(err, kgo.UnsupportedSASLMechanism) || errors.Is(err, kgo.IllegalSASLState)
}

// run follows the group from generation to generation.
func (s *Source) run(ctx context.Context) {
	for {
		gen, err := s.cg.Next(ctx)
		if err != nil {
			if ctx.Err() != nil || errors.Is(err, kgo.ErrGroupClosed) {
				return
			}
			if fatalGroupError(err) {
				s.fail(fmt.Errorf("kafka: group %q: %w", s.o.GroupID, err))
				return
			}
			s.log.Warn("joining the group failed; retrying", zap.Error(err))
			continue
		}
		s.startGeneration(gen)
	}
}

// startGeneration picks each assigned partition's first offset and starts its
// worker. It runs under s.mu with Next's hand-over, so a queued batch is either
// handed over before the offsets are chosen (and counted in them) or dropped
// after (and read again).
func (s *Source) startGeneration(gen *kgo.Generation) {
	type start struct {
		p    int32
		off  int64
		kind startKind
	}
	var starts []start
	s.mu.Lock()
	s.seq++
	seq := s.seq
	prev := s.owned
	s.gen = gen
	s.owned = make(map[int32]*partState)
	s.stats.Generations++
	assigned := map[int32]bool{}
	for _, pa := range gen.Assignments[s.o.Topic] {
		assigned[int32(pa.ID)] = true
	}
	for p := range s.continuous {
		if !assigned[p] {
			s.continuous[p] = false
		}
	}
	for _, pa := range gen.Assignments[s.o.Topic] {
		p := int32(pa.ID)
		committed := pa.Offset
		if committed >= 0 && committed > s.committed[p] {
			s.committed[p] = committed
		}
		d, has := lookupNext(s.delivered, p)
		_, held := prev[p]
		off, kind := chooseStart(d, has, s.continuous[p] || held, committed)
		if off >= 0 {
			s.delivered = setNext(s.delivered, p, off)
		}
		s.continuous[p] = true
		s.owned[p] = &partState{hwm: -1}
		starts = append(starts, start{p, off, kind})
	}
	s.mu.Unlock()
	slices.SortFunc(starts, func(a, b start) int { return int(a.p) - int(b.p) })

	fields := []zap.Field{zap.Int32("generation", gen.ID), zap.String("member", gen.MemberID), zap.Int("partitions", len(starts))}
	for _, st := range starts {
		fields = append(fields, zap.String(fmt.Sprintf("p%d", st.p), fmt.Sprintf("%d (%s)", st.off, st.kind)))
	}
	s.log.Info("assigned partitions", fields...)
	for _, st := range starts {
		gen.Start(func(ctx context.Context) { s.work(ctx, seq, st.p, st.off) })
	}
}

// getItem returns an empty batch for a worker.
func (s *Source) getItem(seq uint64, p int32) *item {
	var it *item
	select {
	case it = <-s.free:
	default:
		it = &item{}
		it.b.Events = make([]stream.Event, 0, s.o.BatchSize)
	}
	it.b.Reset()
	it.seq, it.part = seq, p
	return it
}

func (s *Source) putItem(it *item) {
	select {
	case s.free <- it:
	default:
	}
}

// work reads partition p from offset from (negative: the configured start)
// until ctx ends, pushing decoded batches to s.ready.
func (s *Source) work(ctx context.Context, seq uint64, p int32, from int64) {
	w := worker{s: s, seq: seq, p: p, next: from, buf: make([]byte, 64<<10)}
	if s.o.NewDecoder != nil {
		w.dec = s.o.NewDecoder()
	}
	w.loop(ctx)
}

type worker struct {
	s    *Source
	seq  uint64
	p    int32
	next int64 // next offset to read; negative until resolved
	conn *kgo.Conn
	buf  []byte
	dec  stream.Decoder
	it   *item
}

func (w *worker) loop(ctx context.Context) {
	s := w.s
	defer func() {
		if w.conn != nil {
			w.conn.Close()
		}
		if w.it != nil {
			s.putItem(w.it)
		}
	}()
	backoff := 100 * time.Millisecond
	for ctx.Err() == nil {
		if w.conn == nil {
			if err := w.connect(ctx); err != nil {
				if ctx.Err() != nil {
					return
				}
				if fatalGroupError(err) || errors.Is(err, errBeyondEnd) {
					s.fail(err)
					<-ctx.Done()
					return
				}
				s.log.Warn("partition reader: connect failed; retrying", zap.Int32("partition", w.p), zap.Error(err))
				if !sleep(ctx, backoff) {
					return
				}
				backoff = min(2*backoff, 5*time.Second)
				continue
			}
			backoff = 100 * time.Millisecond
		}
		if err := w.fetch(ctx); err != nil {
			if ctx.Err() != nil {
				return
			}
			s.log.Warn("partition reader: fetch failed; reconnecting", zap.Int32("partition", w.p), zap.Error(err))
			w.conn.Close()
			w.conn = nil
			if !sleep(ctx, backoff) {
				return
			}
		}
	}
}

func sleep(ctx context.Context, d time.Duration) bool {
	t := time.NewTimer(d)
	defer t.Stop()
	select {
	case <-ctx.Done():
		return false
	case <-t.C:
		return true
	}
}

var errBeyondEnd = errors.New("kafka: position beyond the end of the partition")

// connect dials the partition leader and seeks to w.next.
func (w *worker) connect(ctx context.Context) error {
	s := w.s
	var conn *kgo.Conn
	var err error
	for _, b := range s.o.Brokers {
		conn, err = s.dialer.DialLeader(ctx, "tcp", b, s.o.Topic, int(w.p))
		if err == nil {
			break
		}
	}
	if err != nil {
		return err
	}
	first, last, err := conn.ReadOffsets()
	if err != nil {
		conn.Close()
		return err
	}
	switch {
	case w.next < 0:
		w.next = first
		if s.o.Start == LastOffset {
			w.next = last
		}
		s.resolved(w.seq, w.p, w.next)
	case w.next < first:
		s.log.Error("records were deleted by retention before they were read; skipping them",
			zap.Int32("partition", w.p), zap.Int64("next", w.next), zap.Int64("first", first))
		s.mu.Lock()
		s.stats.Skipped += first - w.next
		s.mu.Unlock()
		w.next = first
		s.resolved(w.seq, w.p, w.next)
	case w.next > last:
		conn.Close()
		return fmt.Errorf("kafka: partition %d: next offset %d is beyond the end offset %d (was the topic recreated?): %w",
			w.p, w.next, last, errBeyondEnd)
	}
	if _, err := conn.Seek(w.next, kgo.SeekAbsolute|kgo.SeekDontCheck); err != nil {
		conn.Close()
		return err
	}
	w.conn = conn
	return nil
}

// resolved records the offset a configured start resolved to, as the
// trainer's position, when the generation is still current.
func (s *Source) resolved(seq uint64, p int32, next int64) {
	s.mu.Lock()
	if s.seq == seq {
		s.delivered = setNext(s.delivered, p, next)
	}
	s.mu.Unlock()
}

// fetch reads one fetch response and pushes its records in batches.
func (w *worker) fetch(ctx context.Context) error {
	s := w.s
	if _, err := w.conn.Seek(w.next, kgo.SeekAbsolute|kgo.SeekDontCheck); err != nil {
		return err
	}
	w.conn.SetReadDeadline(time.Now().Add(s.o.MaxWait + 10*time.Second))
	kb := w.conn.ReadBatchWith(kgo.ReadBatchConfig{MinBytes: s.o.MinBytes, MaxBytes: s.o.MaxBytes, MaxWait: s.o.MaxWait})
	hwm := kb.HighWaterMark()
	var rerr error
	for {
		n, err := kb.Read(w.buf)
		if err != nil {
			rerr = err
			break
		}
		off := kb.Offset() - 1
		if off < w.next {
			continue // a record set can start before the offset asked for
		}
		if w.it == nil {
			w.it = s.getItem(w.seq, w.p)
		}
		w.decode(w.buf[:n], off)
		w.next = off + 1
		if w.it.records() >= s.o.BatchSize {
			if !w.push(ctx, hwm) {
				kb.Close()
				return ctx.Err()
			}
		}
	}
	cerr := kb.Close()
	s.mu.Lock()
	if ps, ok := s.owned[w.p]; ok && s.seq == w.seq && hwm > 0 {
		ps.hwm = hwm
	}
	s.mu.Unlock()
	if w.it != nil && w.it.records() > 0 {
		if !w.push(ctx, hwm) {
			return ctx.Err()
		}
	}
	switch {
	case errors.Is(rerr, io.ErrShortBuffer):
		// The record is larger than the buffer: grow it and read again.
		w.buf = make([]byte, 2*len(w.buf))
		return nil
	case rerr == nil, errors.Is(rerr, io.EOF):
		return nil
	case errors.Is(rerr, kgo.RequestTimedOut):
		return nil // no record within MaxWait
	case errors.Is(rerr, kgo.OffsetOutOfRange):
		return rerr // reconnect: connect handles retention and the end
	}
	if cerr != nil {
		return cerr
	}
	return rerr
}

// decode decodes one record into the current batch, or sets it aside.
func (w *worker) decode(rec []byte, off int64) {
	s := w.s
	b := &w.it.b
	n := len(b.Events)
	var err error
	if w.dec != nil {
		err = w.dec.Decode(rec, b)
	} else {
		s.decMu.Lock()
		err = s.o.Decoder.Decode(rec, b)
		s.decMu.Unlock()
	}
	if err == nil {
		for i := n; i < len(b.Events); i++ {
			b.Events[i].Partition, b.Events[i].Offset = w.p, off
		}
		return
	}
	b.Events = b.Events[:n]
	var de *stream.DecodeError
	if !errors.As(err, &de) {
		de = &stream.DecodeError{Reason: err.Error()}
	} else {
		c := *de
		de = &c
	}
	if de.Where == "" {
		de.Where = fmt.Sprintf("partition %d offset %d", w.p, off)
	}
	b.Rejected++
	if rerr := s.dl.Reject(stream.Rejected{Raw: rec, Err: de, Partition: w.p, Offset: off}); rerr != nil {
		s.log.Warn("dead-letter queue refused a record", zap.Int32("partition", w.p), zap.Int64("offset", off), zap.Error(rerr))
	}
}

// push hands the current batch to the trainer's queue.
func (w *worker) push(ctx context.Context, hwm int64) bool {
	it := w.it
	it.next, it.hwm = w.next, hwm
	select {
	case w.s.ready <- it:
		w.it = nil
		return true
	case <-ctx.Done():
		return false
	}
}

// Next returns the next decoded batch (see stream.Source). Its Pos holds the
// next offset of every partition this source has read, sorted by partition.
func (s *Source) Next(ctx context.Context) (*stream.Batch, error) {
	if s.cur != nil {
		s.putItem(s.cur)
		s.cur = nil
	}
	if s.err != nil {
		return nil, s.err
	}
	s.timer.Reset(idleEvery)
	for {
		select {
		case it := <-s.ready:
			s.mu.Lock()
			if it.seq != s.seq {
				s.stats.Discarded++
				s.mu.Unlock()
				s.putItem(it)
				continue
			}
			s.delivered = setNext(s.delivered, it.part, it.next)
			s.stats.Records += int64(it.records())
			s.stats.Events += int64(len(it.b.Events))
			s.stats.Rejected += int64(it.b.Rejected)
			s.fillPos(&it.b.Pos)
			s.mu.Unlock()
			s.cur = it
			return &it.b, nil
		case err := <-s.fatal:
			s.err = err
			return nil, err
		case <-s.timer.C:
			s.idle.b.Reset()
			s.mu.Lock()
			s.fillPos(&s.idle.b.Pos)
			s.mu.Unlock()
			return &s.idle.b, nil
		case <-ctx.Done():
			return nil, ctx.Err()
		}
	}
}

// fillPos writes the current position into p, reusing its slice. s.mu held.
func (s *Source) fillPos(p *stream.Position) {
	p.Source, p.Topic = "kafka", s.o.Topic
	p.Partitions = append(p.Partitions[:0], s.delivered...)
}

// Position returns the position after the last batch handed over.
func (s *Source) Position() stream.Position {
	s.mu.Lock()
	defer s.mu.Unlock()
	var p stream.Position
	s.fillPos(&p)
	return p
}

// Commit commits p's next offsets for the partitions the current generation
// assigned to this source (see the package doc). A failed commit is logged and
// counted, not returned: the partition was most likely taken by a rebalance,
// and its new owner starts from the last successful commit.
func (s *Source) Commit(ctx context.Context, p stream.Position) error {
	if p.Source != "kafka" || p.Topic != s.o.Topic {
		return fmt.Errorf("kafka: commit: position %s is not of topic %q", p, s.o.Topic)
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	s.mu.Lock()
	gen := s.gen
	plan := planCommit(p.Partitions, s.owned, s.committed, s.dl.Held)
	s.mu.Unlock()
	if gen == nil || len(plan) == 0 {
		return nil
	}
	err := gen.CommitOffsets(map[string]map[int]int64{s.o.Topic: plan})
	s.mu.Lock()
	defer s.mu.Unlock()
	if err != nil {
		s.stats.CommitErrors++
		s.log.Warn("commit failed; taking the partitions as lost", zap.Int32("generation", gen.ID), zap.Error(err))
		return nil
	}
	s.stats.Commits++
	for part, v := range plan {
		if v > s.committed[int32(part)] {
			s.committed[int32(part)] = v
		}
	}
	return nil
}

// Lag returns the progress of each partition the current generation assigned
// to this source, sorted by partition.
func (s *Source) Lag() []PartitionLag {
	s.mu.Lock()
	defer s.mu.Unlock()
	out := make([]PartitionLag, 0, len(s.owned))
	for p, ps := range s.owned {
		next, _ := lookupNext(s.delivered, p)
		l := PartitionLag{Partition: p, Next: next, HighWaterMark: ps.hwm}
		if ps.hwm >= 0 && ps.hwm > next {
			l.Lag = ps.hwm - next
		}
		out = append(out, l)
	}
	slices.SortFunc(out, func(a, b PartitionLag) int { return int(a.Partition) - int(b.Partition) })
	return out
}

// LagSummary formats Lag for a progress log line: "partition:lag" pairs,
// space-separated, with the total first ("total 120 0:100 1:20").
func (s *Source) LagSummary() string {
	lags := s.Lag()
	var total int64
	for _, l := range lags {
		total += l.Lag
	}
	b := strconv.AppendInt([]byte("total "), total, 10)
	for _, l := range lags {
		b = append(b, ' ')
		b = strconv.AppendInt(b, int64(l.Partition), 10)
		b = append(b, ':')
		b = strconv.AppendInt(b, l.Lag, 10)
	}
	return string(b)
}

// LagPartitions returns Lag as parallel slices of partitions and lags.
func (s *Source) LagPartitions() (partitions []int32, lags []int64) {
	for _, l := range s.Lag() {
		partitions = append(partitions, l.Partition)
		lags = append(lags, l.Lag)
	}
	return partitions, lags
}

// Assignment returns the current generation's ID (-1 before the first) and
// the partitions it assigned to this source, sorted.
func (s *Source) Assignment() (generation int32, partitions []int32) {
	s.mu.Lock()
	defer s.mu.Unlock()
	generation = -1
	if s.gen != nil {
		generation = s.gen.ID
	}
	for p := range s.owned {
		partitions = append(partitions, p)
	}
	slices.Sort(partitions)
	return generation, partitions
}

// Stats returns the counters.
func (s *Source) Stats() Stats {
	s.mu.Lock()
	st := s.stats
	s.mu.Unlock()
	if s.dl != nil {
		st.DeadLettered = s.dl.Written()
	}
	return st
}

// Close leaves the group, stops the workers, and flushes the dead-letter
// queue (for up to 10 s). It is safe to call more than once.
func (s *Source) Close() error {
	var err error
	s.closeOnce.Do(func() {
		s.cancel()
		err = s.cg.Close()
		s.wg.Wait()
		if derr := s.dl.Close(10 * time.Second); derr != nil && err == nil {
			err = derr
		}
		s.timer.Stop()
	})
	return err
}

var (
	_ stream.Source   = (*Source)(nil)
	_ stream.Rejecter = (*DeadLetter)(nil)
)
