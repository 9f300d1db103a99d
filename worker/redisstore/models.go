package redisstore

import (
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"math"
	"strconv"
	"time"

	"github.com/redis/go-redis/v9"

	"github.com/beliefd/beliefd/service/jobs"
)

// PutModel stores doc as the next version of info.Name unless the latest
// version has info.Hash; see jobs.ModelStore. CreatedAt is kept when set,
// else it is the current time.
func (s *Store) PutModel(ctx context.Context, info jobs.ModelInfo, doc []byte) (jobs.ModelInfo, bool, error) {
	if info.Name == "" {
		return jobs.ModelInfo{}, false, errors.New("redisstore: put model: the model has no name")
	}
	if info.CreatedAt.IsZero() {
		info.CreatedAt = time.Now().UTC()
	}
	info.Version = 0 // stored versionless: the version is the hash field
	enc, err := json.Marshal(info)
	if err != nil {
		return jobs.ModelInfo{}, false, fmt.Errorf("redisstore: put model %s: encode: %w", info.Name, err)
	}
	// Three steps, each on one slot (doc.go, "Steps across slots"):
	// announce the put on {global}, store the version on {model:NAME},
	// list the name on {global}.
	mark, err := announceModelScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), info.Name, token()[:8]).Text()
	if err != nil {
		return jobs.ModelInfo{}, false, s.fail(ctx, "put model", err)
	}
	mk := s.k.model(info.Name)
	res, err := putModelScript.Run(ctx, s.rdb, []string{mk.head, mk.info, mk.doc},
		info.Hash, enc, doc, token()).Slice()
	if err != nil {
		return jobs.ModelInfo{}, false, s.fail(ctx, "put model", err)
	}
	if err := listModelScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), info.Name, mark).Err(); err != nil {
		return jobs.ModelInfo{}, false, s.fail(ctx, "put model", err)
	}
	if len(res) != 3 {
		return jobs.ModelInfo{}, false, fmt.Errorf("redisstore: put model %s: unexpected reply %v", info.Name, res)
	}
	v, _ := res[0].(int64)
	created, _ := res[1].(int64)
	stored, err := decodeModelInfo(info.Name, v, res[2])
	if err != nil {
		return jobs.ModelInfo{}, false, err
	}
	return stored, created == 1, nil
}

func decodeModelInfo(name string, version int64, raw any) (jobs.ModelInfo, error) {
	str, ok := raw.(string)
	if !ok {
		return jobs.ModelInfo{}, fmt.Errorf("redisstore: model %s@%d: info missing", name, version)
	}
	var info jobs.ModelInfo
	if err := json.Unmarshal([]byte(str), &info); err != nil {
		return jobs.ModelInfo{}, fmt.Errorf("redisstore: model %s@%d: decode: %w", name, version, err)
	}
	info.Version = int(version)
	return info, nil
}

// GetModel returns a version of a model, 0 meaning the latest.
func (s *Store) GetModel(ctx context.Context, name string, version int) (jobs.ModelInfo, []byte, error) {
	if version < 0 {
		return jobs.ModelInfo{}, nil, fmt.Errorf("redisstore: model %s@%d: %w", name, version, jobs.ErrNotFound)
	}
	info, doc, err := s.getModel(ctx, name, version, true)
	return info, doc, err
}

func (s *Store) getModel(ctx context.Context, name string, version int, withDoc bool) (jobs.ModelInfo, []byte, error) {
	mk := s.k.model(name)
	wd := "0"
	if withDoc {
		wd = "1"
	}
	res, err := getModelScript.Run(ctx, s.rdb, []string{mk.head, mk.info, mk.doc}, version, wd).Slice()
	if errors.Is(err, redis.Nil) {
		if version == 0 {
			return jobs.ModelInfo{}, nil, fmt.Errorf("redisstore: model %s: %w", name, jobs.ErrNotFound)
		}
		return jobs.ModelInfo{}, nil, fmt.Errorf("redisstore: model %s@%d: %w", name, version, jobs.ErrNotFound)
	}
	if err != nil {
		return jobs.ModelInfo{}, nil, s.fail(ctx, "get model", err)
	}
	if len(res) != 3 {
		return jobs.ModelInfo{}, nil, fmt.Errorf("redisstore: get model %s: unexpected reply %v", name, res)
	}
	v, _ := res[0].(int64)
	info, err := decodeModelInfo(name, v, res[1])
	if err != nil {
		return jobs.ModelInfo{}, nil, err
	}
	var doc []byte
	if withDoc {
		str, _ := res[2].(string)
		doc = []byte(str)
	}
	return info, doc, nil
}

// ListModels returns the latest version of each model whose name sorts
// after `after`, in name order (byte order), at most limit of them (all
// when limit <= 0).
func (s *Store) ListModels(ctx context.Context, after string, limit int) ([]jobs.ModelInfo, error) {
	out := []jobs.ModelInfo{}
	if limit <= 0 {
		limit = math.MaxInt
	}
	lo := "-"
	if after != "" {
		lo = "(" + after
	}
	for len(out) < limit {
		want := min(limit-len(out), listChunk)
		names, err := s.rdb.ZRangeByLex(ctx, s.k.models(), &redis.ZRangeBy{Min: lo, Max: "+", Count: int64(want)}).Result()
		if err != nil {
			return nil, s.fail(ctx, "list models", err)
		}
		if len(names) == 0 {
			break
		}
		infos, err := s.latestInfos(ctx, names)
		if err != nil {
			return nil, err
		}
		out = append(out, infos...)
		if len(names) < want {
			break
		}
		lo = "(" + names[len(names)-1]
	}
	return out, nil
}

// latestInfos reads the latest version of each named model, in two
// pipelined rounds; models deleted meanwhile are left out.
func (s *Store) latestInfos(ctx context.Context, names []string) ([]jobs.ModelInfo, error) {
	pipe := s.rdb.Pipeline()
	heads := make([]*redis.StringCmd, len(names))
	for i, n := range names {
		heads[i] = pipe.HGet(ctx, s.k.model(n).head, "version")
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return nil, s.fail(ctx, "list models", err)
	}
	pipe = s.rdb.Pipeline()
	infos := make([]*redis.StringCmd, len(names))
	versions := make([]int64, len(names))
	for i, n := range names {
		v, err := heads[i].Int64()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return nil, s.fail(ctx, "list models", err)
		}
		versions[i] = v
		infos[i] = pipe.HGet(ctx, s.k.model(n).info, strconv.FormatInt(v, 10))
	}
	if _, err := pipe.Exec(ctx); err != nil && !errors.Is(err, redis.Nil) {
		return nil, s.fail(ctx, "list models", err)
	}
	out := make([]jobs.ModelInfo, 0, len(names))
	for i, n := range names {
		if infos[i] == nil {
			continue
		}
		raw, err := infos[i].Result()
		if errors.Is(err, redis.Nil) {
			continue
		}
		if err != nil {
			return nil, s.fail(ctx, "list models", err)
		}
		info, err := decodeModelInfo(n, versions[i], raw)
		if err != nil {
			return nil, err
		}
		out = append(out, info)
	}
	return out, nil
}

// DeleteModel removes every version of a model; jobs.ErrNotFound when
// there is none. The versions go first, on {model:NAME}, then the name
// leaves the index on {global}.
func (s *Store) DeleteModel(ctx context.Context, name string) error {
	mk := s.k.model(name)
	n, err := deleteModelScript.Run(ctx, s.rdb, []string{mk.head, mk.info, mk.doc}).Int()
	if err != nil {
		return s.fail(ctx, "delete model", err)
	}
	if _, err := s.unlistModel(ctx, name); err != nil {
		return err
	}
	if n == 0 {
		return fmt.Errorf("redisstore: model %s: %w", name, jobs.ErrNotFound)
	}
	return nil
}

// unlistModel takes a name out of the index, then looks again: a model
// stored meanwhile (a PutModel lists its name only after storing it) is
// listed again. It reports whether the name stays out.
func (s *Store) unlistModel(ctx context.Context, name string) (bool, error) {
	if err := s.rdb.ZRem(ctx, s.k.models(), name).Err(); err != nil {
		return false, s.fail(ctx, "unlist model", err)
	}
	n, err := s.rdb.Exists(ctx, s.k.model(name).head).Result()
	if err != nil {
		return false, s.fail(ctx, "unlist model", err)
	}
	if n == 0 {
		return true, nil
	}
	if err := listModelScript.Run(ctx, s.rdb, []string{s.k.meta()}, s.k.global(), name, "").Err(); err != nil {
		return false, s.fail(ctx, "unlist model", err)
	}
	return false, nil
}
