package redisstore

import (
	"context"
	"errors"
	"fmt"
	"math/rand/v2"
	"strconv"
	"strings"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
)

// sweepChunk bounds the jobs or models one round trip of the sweep looks
// at.
const sweepChunk = 500

// SweepReport tells what a sweep found half done and repaired.
type SweepReport struct {
	// Creations counts creations older than the write window that the
	// sweep settled; Undone counts those among them whose record was never
	// written, so that their reservation was undone.
	Creations, Undone int
	// Resynced counts jobs whose indexes lagged behind their record.
	Resynced int
	// Forgotten counts jobs in the indexes without a record.
	Forgotten int
	// Pruned counts finished jobs dropped from the indexes after their
	// records expired (routine, not a repair).
	Pruned int
	// ModelsListed counts stored models whose name was missing from the
	// index; ModelsUnlisted counts names listed without a model.
	ModelsListed, ModelsUnlisted int
}

// Repairs counts what the sweep found half done.
func (r SweepReport) Repairs() int {
	return r.Creations + r.Resynced + r.Forgotten + r.ModelsListed + r.ModelsUnlisted
}

// Sweep checks the indexes on {global} against the job records and the
// models, and repairs what a call interrupted between its steps left half
// done (doc.go, "Steps across slots"):
//
//   - a creation in progress for longer than the write window plus twice
//     the skew margin is completed when its record exists, else undone;
//   - a queued or running job whose record has a later revision than the
//     indexes reflect is placed by its record (a finished job leaves the
//     queue and its quota count); one without a record is forgotten;
//   - expired finished jobs are dropped from the listings;
//   - a model put that stopped before listing its name is listed, and a
//     listed name without a model is dropped.
//
// Every repair is idempotent and safe beside the calls it repairs, so
// sweeps may run at any time, in any number of processes. The Store
// sweeps by itself every Options.SweepEvery.
func (s *Store) Sweep(ctx context.Context) (SweepReport, error) {
	s.missMu.Lock()
	defer s.missMu.Unlock()
	s.missPrev, s.missCur = s.missCur, map[string]bool{}
	var rep SweepReport
	creating, err := s.sweepCreations(ctx, &rep)
	if err != nil {
		return rep, err
	}
	if err := s.sweepUnfinished(ctx, creating, &rep); err != nil {
		return rep, err
	}
	if err := s.sweepExpired(ctx, &rep); err != nil {
		return rep, err
	}
	if err := s.sweepModels(ctx, &rep); err != nil {
		return rep, err
	}
	return rep, nil
}

// jobFields are the fields of a record the indexes are made from.
var jobFields = []string{"rev", "state", "seq", "prio", "ret"}

// syncArgsOf reads syncArgs from the values of jobFields; ok is false when
// the record does not exist.
func syncArgsOf(id string, vals []any) (syncArgs, bool) {
	str := make([]string, len(vals))
	for i, v := range vals {
		str[i], _ = v.(string)
	}
	if str[0] == "" {
		return syncArgs{}, false
	}
	rev, _ := strconv.ParseInt(str[0], 10, 64)
	prio, _ := strconv.Atoi(str[3])
	ret, _ := strconv.ParseInt(str[4], 10, 64)
	return syncArgs{id: id, rev: rev, state: jobs.State(str[1]), prio: prio, seq: str[2], retention: time.Duration(ret) * time.Millisecond}, true
}

// resync runs syncJob for a record's values and reports its answer.
func (s *Store) resync(ctx context.Context, a syncArgs) (string, error) {
	res, err := syncJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(),
		a.id, a.rev, string(a.state), a.prio, a.seq, a.retention.Milliseconds()).Text()
	if err != nil {
		return "", s.fail(ctx, "sweep", err)
	}
	return res, nil
}

// sweepCreations settles the creations in progress past the grace
// period. It returns the IDs of all creations in progress it saw.
func (s *Store) sweepCreations(ctx context.Context, rep *SweepReport) (map[string]bool, error) {
	st, err := sweepStateScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global()).StringSlice()
	if err != nil {
		return nil, s.fail(ctx, "sweep", err)
	}
	now, _ := strconv.ParseInt(st[0], 10, 64)
	creating := map[string]bool{}
	for i := 1; i+1 < len(st); i += 2 {
		id, val := st[i], st[i+1]
		creating[id] = true
		parts := strings.SplitN(val, "\n", 3)
		if len(parts) != 3 {
			return nil, fmt.Errorf("redisstore: sweep: creation of job %s: bad entry %q", id, val)
		}
		tok := parts[0]
		at, _ := strconv.ParseInt(parts[1], 10, 64)
		if now-at <= s.grace.Milliseconds() {
			continue // the creator may still write the record
		}
		// The write window has passed on every node's clock: the record
		// exists now or never will.
		vals, err := s.rdb.HMGet(ctx, s.k.job(id).rec, jobFields...).Result()
		if err != nil {
			return nil, s.fail(ctx, "sweep", err)
		}
		rep.Creations++
		if a, ok := syncArgsOf(id, vals); ok {
			if _, err := s.resync(ctx, a); err != nil {
				return nil, err
			}
			continue
		}
		res, err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), id, tok, "").Text()
		if err != nil {
			return nil, s.fail(ctx, "sweep", err)
		}
		if res == "forgotten" {
			rep.Undone++
		}
	}
	return creating, nil
}

// sweepUnfinished compares the queued and running jobs of the indexes with
// their records.
func (s *Store) sweepUnfinished(ctx context.Context, creating map[string]bool, rep *SweepReport) error {
	seen := map[string]bool{}
	for _, set := range []string{s.k.queued(), s.k.running()} {
		var cursor uint64
		for {
			ids, next, err := s.rdb.SScan(ctx, set, cursor, "", sweepChunk).Result()
			if err != nil {
				return s.fail(ctx, "sweep", err)
			}
			var batch []string
			for _, id := range ids {
				if !seen[id] && !creating[id] {
					seen[id] = true
					batch = append(batch, id)
				}
			}
			if err := s.sweepBatch(ctx, batch, rep); err != nil {
				return err
			}
			if cursor = next; cursor == 0 {
				break
			}
		}
	}
	return nil
}

func (s *Store) sweepBatch(ctx context.Context, ids []string, rep *SweepReport) error {
	if len(ids) == 0 {
		return nil
	}
	pipe := s.rdb.Pipeline()
	recs := make([]*redis.SliceCmd, len(ids))
	for i, id := range ids {
		recs[i] = pipe.HMGet(ctx, s.k.job(id).rec, jobFields...)
	}
	meta := pipe.HMGet(ctx, s.k.meta(), ids...)
	if _, err := pipe.Exec(ctx); err != nil {
		return s.fail(ctx, "sweep", err)
	}
	for i, id := range ids {
		a, ok := syncArgsOf(id, recs[i].Val())
		if !ok {
			// A complete job without a record is either being read just
			// before its creation's write landed, or lost by the server:
			// it is forgotten when the previous sweep missed it too.
			force := ""
			if s.missedBefore(id) {
				force = "force"
			}
			res, err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), id, "", "", force).Text()
			if err != nil {
				return s.fail(ctx, "sweep", err)
			}
			switch res {
			case "forgotten":
				rep.Forgotten++
			case "exists":
				s.missed(id)
			}
			continue
		}
		m, _ := meta.Val()[i].(string)
		rev0, _ := strconv.ParseInt(strings.SplitN(m, "\n", 2)[0], 10, 64)
		if a.rev <= rev0 {
			continue
		}
		res, err := s.resync(ctx, a)
		if err != nil {
			return err
		}
		if res == "ok" {
			rep.Resynced++
		}
	}
	return nil
}

// sweepExpired forgets the finished jobs whose retention has passed by
// the {global} node's clock and whose record is gone; a record still there
// (its node's clock is behind) waits for the next sweep, and one that is
// unfinished again is placed by its record.
func (s *Store) sweepExpired(ctx context.Context, rep *SweepReport) error {
	st, err := sweepStateScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global()).StringSlice()
	if err != nil {
		return s.fail(ctx, "sweep", err)
	}
	var offset int64
	for {
		ids, err := s.rdb.ZRangeByScore(ctx, s.k.expiring(), &redis.ZRangeBy{Min: "-inf", Max: st[0], Offset: offset, Count: sweepChunk}).Result()
		if err != nil {
			return s.fail(ctx, "sweep", err)
		}
		if len(ids) == 0 {
			return nil
		}
		pipe := s.rdb.Pipeline()
		recs := make([]*redis.SliceCmd, len(ids))
		for i, id := range ids {
			recs[i] = pipe.HMGet(ctx, s.k.job(id).rec, jobFields...)
		}
		if _, err := pipe.Exec(ctx); err != nil {
			return s.fail(ctx, "sweep", err)
		}
		for i, id := range ids {
			a, ok := syncArgsOf(id, recs[i].Val())
			if !ok {
				res, err := forgetJobScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), id, "", "").Text()
				if err != nil {
					return s.fail(ctx, "sweep", err)
				}
				if res == "forgotten" {
					rep.Pruned++
				}
				continue
			}
			offset++ // left in the index
			if a.state == jobs.StateQueued || a.state == jobs.StateRunning {
				res, err := s.resync(ctx, a)
				if err != nil {
					return err
				}
				if res == "ok" {
					rep.Resynced++
					offset--
				}
			}
		}
		if len(ids) < sweepChunk {
			return nil
		}
	}
}

// sweepModels lists models whose put stopped before listing them, and
// drops listed names without a model.
func (s *Store) sweepModels(ctx context.Context, rep *SweepReport) error {
	st, err := sweepStateScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global()).StringSlice()
	if err != nil {
		return s.fail(ctx, "sweep", err)
	}
	now, _ := strconv.ParseInt(st[0], 10, 64)
	marks, err := s.rdb.HGetAll(ctx, s.k.modelPuts()).Result()
	if err != nil {
		return s.fail(ctx, "sweep", err)
	}
	for name, mark := range marks {
		at, _ := strconv.ParseInt(strings.SplitN(mark, "-", 2)[0], 10, 64)
		if now-at <= s.grace.Milliseconds() {
			continue
		}
		n, err := s.rdb.Exists(ctx, s.k.model(name).head).Result()
		if err != nil {
			return s.fail(ctx, "sweep", err)
		}
		script := dropModelMarkScript
		if n > 0 {
			script = listModelScript
		}
		added, err := script.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), name, mark).Int()
		if err != nil {
			return s.fail(ctx, "sweep", err)
		}
		if n > 0 && added == 1 {
			rep.ModelsListed++
		}
	}
	lo := "-"
	for {
		names, err := s.rdb.ZRangeByLex(ctx, s.k.models(), &redis.ZRangeBy{Min: lo, Max: "+", Count: sweepChunk}).Result()
		if err != nil {
			return s.fail(ctx, "sweep", err)
		}
		if len(names) == 0 {
			return nil
		}
		pipe := s.rdb.Pipeline()
		heads := make([]*redis.IntCmd, len(names))
		for i, n := range names {
			heads[i] = pipe.Exists(ctx, s.k.model(n).head)
		}
		if _, err := pipe.Exec(ctx); err != nil {
			return s.fail(ctx, "sweep", err)
		}
		for i, n := range names {
			if heads[i].Val() > 0 {
				continue
			}
			gone, err := s.unlistModel(ctx, n)
			if err != nil {
				return err
			}
			if gone {
				rep.ModelsUnlisted++
			}
		}
		if len(names) < sweepChunk {
			return nil
		}
		lo = "(" + names[len(names)-1]
	}
}

// sweepLoop sweeps about every `every`, taking turns with the other
// processes on the same Redis (a lock on {global} that lasts most of an
// interval), until Close.
func (s *Store) sweepLoop(every time.Duration) {
	defer close(s.sweepDone)
	for {
		// Jitter spreads the processes' attempts over the interval.
		wait := every/2 + time.Duration(rand.Int64N(int64(every)))
		t := time.NewTimer(wait)
		select {
		case <-s.quit:
			t.Stop()
			return
		case <-t.C:
		}
		s.sweepTurn(every)
	}
}

// sweepTurn sweeps if no other process has swept in the last interval.
func (s *Store) sweepTurn(every time.Duration) {
	ctx, cancel := context.WithTimeout(context.Background(), every)
	defer cancel()
	go func() {
		select {
		case <-s.quit:
			cancel()
		case <-ctx.Done():
		}
	}()
	won, err := s.rdb.SetNX(ctx, s.k.sweepLock(), "1", every*9/10).Result()
	if err != nil || !won {
		return
	}
	rep, err := s.Sweep(ctx)
	switch {
	case err != nil && !errors.Is(err, context.Canceled):
		s.log.Warn("sweep", "err", err)
	case rep.Repairs() > 0:
		s.log.Info("sweep repaired half-done calls", "creations", rep.Creations, "undone", rep.Undone,
			"resynced", rep.Resynced, "forgotten", rep.Forgotten, "models_listed", rep.ModelsListed, "models_unlisted", rep.ModelsUnlisted)
	}
}

// missed notes a job found without a record in this sweep; missedBefore
// reports whether the previous sweep found it so too. Sweep holds missMu.
func (s *Store) missed(id string)            { s.missCur[id] = true }
func (s *Store) missedBefore(id string) bool { return s.missPrev[id] }
