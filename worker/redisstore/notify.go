package redisstore

import (
	"context"
	"errors"
	"fmt"
	"net"
	"sync"
	"time"

	"github.com/redis/go-redis/v9"
)

// Notification timing.
const (
	// healthEvery is how long the notification connection may stay silent
	// before it is pinged; a second silent period means it is dead.
	healthEvery = 15 * time.Second
	// maxBackoff caps the wait between reconnection attempts.
	maxBackoff = 2 * time.Second
	// opTimeout bounds a SUBSCRIBE or UNSUBSCRIBE sent on cancel.
	opTimeout = 3 * time.Second
	// forgetTimeout bounds the UNSUBSCRIBE after a failed SUBSCRIBE.
	forgetTimeout = 250 * time.Millisecond
)

// Notify publishes a change of topic on the topic's channel.
func (s *Store) Notify(ctx context.Context, topic string) error {
	return s.fail(ctx, "notify", s.rdb.Publish(ctx, s.k.channel(topic), "").Err())
}

// Subscribe returns a channel that receives a value after changes of
// topic, coalesced into one pending signal, until cancel is called or ctx
// ends (the channel is never closed: a reader selects on its own context
// too). All subscriptions of a Store share one Redis connection and one
// reading goroutine; a subscription itself holds no goroutine. When that
// connection breaks, every subscriber gets a signal (changes may have been
// missed) and gets another once it is back.
func (s *Store) Subscribe(ctx context.Context, topic string) (<-chan struct{}, func(), error) {
	if err := ctx.Err(); err != nil {
		return nil, nil, fmt.Errorf("redisstore: subscribe: %w", err)
	}
	sub, err := s.hub.add(ctx, s.k.channel(topic))
	if err != nil {
		return nil, nil, s.fail(ctx, "subscribe", err)
	}
	stop := context.AfterFunc(ctx, func() { s.hub.remove(sub) })
	cancel := func() {
		stop()
		s.hub.remove(sub)
	}
	return sub.ch, cancel, nil
}

// sub is one subscriber.
type sub struct {
	channel string
	ch      chan struct{}
}

// hub multiplexes the subscriptions of a Store over one pub/sub
// connection, read by one goroutine that lives until Close.
type hub struct {
	s *Store

	// opMu serialises SUBSCRIBE/UNSUBSCRIBE so that they follow the order
	// in which channels gain their first and lose their last subscriber.
	opMu sync.Mutex

	mu     sync.Mutex
	ps     *redis.PubSub
	subs   map[string]map[*sub]struct{}
	closed bool
	quit   chan struct{}
	done   chan struct{}
}

func newHub(s *Store) *hub {
	return &hub{s: s, subs: map[string]map[*sub]struct{}{}, quit: make(chan struct{})}
}

var errClosed = errors.New("store is closed")

// add registers a subscriber, subscribing to the channel when it is the
// channel's first.
func (h *hub) add(ctx context.Context, channel string) (*sub, error) {
	h.opMu.Lock()
	defer h.opMu.Unlock()
	h.mu.Lock()
	if h.closed {
		h.mu.Unlock()
		return nil, errClosed
	}
	if h.ps == nil {
		h.ps = h.s.rdb.Subscribe(context.Background()) // no channel yet: no I/O
		h.done = make(chan struct{})
		go h.run(h.ps)
	}
	set := h.subs[channel]
	first := set == nil
	if first {
		set = map[*sub]struct{}{}
		h.subs[channel] = set
	}
	sb := &sub{channel: channel, ch: make(chan struct{}, 1)}
	set[sb] = struct{}{}
	ps := h.ps
	h.mu.Unlock()
	if first {
		if err := ps.Subscribe(ctx, channel); err != nil {
			h.mu.Lock()
			h.drop(sb)
			h.mu.Unlock()
			// SUBSCRIBE remembers the channel even when sending failed;
			// forget it (briefly: the server is likely unreachable).
			uctx, cancel := context.WithTimeout(context.Background(), forgetTimeout)
			_ = ps.Unsubscribe(uctx, channel)
			cancel()
			return nil, err
		}
	}
	return sb, nil
}

// drop removes sb; it reports whether sb's channel has no subscriber
// left. Callers hold mu.
func (h *hub) drop(sb *sub) (last bool) {
	set, ok := h.subs[sb.channel]
	if !ok {
		return false
	}
	if _, ok := set[sb]; !ok {
		return false
	}
	delete(set, sb)
	if len(set) == 0 {
		delete(h.subs, sb.channel)
		return true
	}
	return false
}

// remove ends a subscription (idempotent).
func (h *hub) remove(sb *sub) {
	h.opMu.Lock()
	defer h.opMu.Unlock()
	h.mu.Lock()
	last := h.drop(sb)
	ps, closed := h.ps, h.closed
	h.mu.Unlock()
	if last && !closed && ps != nil {
		ctx, cancel := context.WithTimeout(context.Background(), opTimeout)
		_ = ps.Unsubscribe(ctx, sb.channel) // best effort: a stray message finds no subscriber
		cancel()
	}
}

// signal wakes the subscribers of channel ("" for all) without blocking:
// a subscriber with a pending signal keeps just that one.
func (h *hub) signal(channel string) {
	h.mu.Lock()
	defer h.mu.Unlock()
	for c, set := range h.subs {
		if channel != "" && c != channel {
			continue
		}
		for sb := range set {
			select {
			case sb.ch <- struct{}{}:
			default:
			}
		}
	}
}

// run reads the pub/sub connection until Close.
func (h *hub) run(ps *redis.PubSub) {
	defer close(h.done)
	ctx := context.Background()
	var (
		backoff time.Duration
		silent  bool // a ping is outstanding
		broken  bool // the connection failed; signal everyone when it is back
	)
	for {
		msg, err := ps.ReceiveTimeout(ctx, healthEvery)
		if err != nil {
			if h.isClosed() || errors.Is(err, redis.ErrClosed) {
				return
			}
			var ne net.Error
			if errors.As(err, &ne) && ne.Timeout() && !silent {
				silent = true
				pctx, cancel := context.WithTimeout(ctx, opTimeout)
				perr := ps.Ping(pctx)
				cancel()
				if perr == nil {
					continue
				}
			}
			if !broken {
				h.s.log.Warn("notification connection lost; reconnecting", "err", err)
				broken = true
				h.signal("")
			}
			if silent {
				// No answer to a ping: the connection is dead without having
				// failed. Start over with a fresh one.
				if ps = h.renew(ps); ps == nil {
					return
				}
				silent = false
			}
			backoff = min(max(2*backoff, 50*time.Millisecond), maxBackoff)
			select {
			case <-h.quit:
				return
			case <-time.After(backoff):
			}
			continue
		}
		silent, backoff = false, 0
		if broken {
			broken = false
			h.s.log.Info("notification connection restored")
			h.signal("")
		}
		if m, ok := msg.(*redis.Message); ok {
			h.signal(m.Channel)
		}
	}
}

// renew replaces a dead pub/sub connection with a new one subscribed to
// the same channels; nil when the hub is closed.
func (h *hub) renew(old *redis.PubSub) *redis.PubSub {
	h.opMu.Lock()
	defer h.opMu.Unlock()
	h.mu.Lock()
	if h.closed {
		h.mu.Unlock()
		return nil
	}
	_ = old.Close()
	ps := h.s.rdb.Subscribe(context.Background())
	h.ps = ps
	channels := make([]string, 0, len(h.subs))
	for c := range h.subs {
		channels = append(channels, c)
	}
	h.mu.Unlock()
	if len(channels) > 0 {
		ctx, cancel := context.WithTimeout(context.Background(), opTimeout)
		_ = ps.Subscribe(ctx, channels...) // remembered and resent on reconnect if this fails
		cancel()
	}
	return ps
}

func (h *hub) isClosed() bool {
	h.mu.Lock()
	defer h.mu.Unlock()
	return h.closed
}

// close ends every subscription (no more signals) and the reading goroutine.
func (h *hub) close() {
	h.opMu.Lock()
	h.mu.Lock()
	if h.closed {
		h.mu.Unlock()
		h.opMu.Unlock()
		return
	}
	h.closed = true
	close(h.quit)
	h.subs = nil
	ps, done := h.ps, h.done
	h.mu.Unlock()
	// Release opMu before waiting: the reading goroutine may be about to
	// take it to renew its connection (it then sees closed and ends).
	h.opMu.Unlock()
	if ps != nil {
		_ = ps.Close()
		<-done
	}
}
