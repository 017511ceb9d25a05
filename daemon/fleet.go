package daemon

import (
	"bytes"
	"context"
	"encoding/json"
	"errors"
	"fmt"
	"regexp"
	"slices"
	"strings"
	"time"

	"github.com/nats-io/nats.go"
	"github.com/nats-io/nats.go/jetstream"

	"surmise/daemon/lease"
)

// A fleet is a group of daemons that share the estimators whose plant and
// gains files are stored in one JetStream key-value bucket. Its three
// buckets, for a fleet NAME:
//
//	surmise-fleet-NAME         plant.<estimator>, gains.<estimator>: the files
//	                           as put by `surmise fleet put`; history kept, so
//	                           the bucket's revisions are the audit of changes
//	surmise-fleet-NAME-leases  estimator.<estimator>: the owner of each
//	                           estimator; member.<instance>: the daemons alive
//	                           (leases with a time-to-live, package lease)
//	surmise-fleet-NAME-state   checkpoint.<estimator>: the owner's latest
//	                           filter state and covariance
//
// All three are replicated on three servers when the connection is to a
// cluster, on one otherwise.
const (
	fleetBucketPrefix = "surmise-fleet-"
	// FleetHistory is how many revisions of each key the files bucket
	// keeps: the audit trail of a plant's and its gains' changes.
	FleetHistory = 64
	// DefaultCheckpointEvery is how often the owner of an estimator saves
	// its filter's state and covariance.
	DefaultCheckpointEvery = 5 * time.Second

	fleetPlantKey      = "plant."
	fleetGainsKey      = "gains."
	fleetEstimatorKey  = "estimator."
	fleetMemberKey     = "member."
	fleetCheckpointKey = "checkpoint."
)

// fleetName is what a fleet name may be: like an estimator name.
var fleetName = regexp.MustCompile(`^[a-z][a-z0-9_-]{0,62}$`)

// instanceName is what an instance name must be in a fleet: a key token.
var instanceName = regexp.MustCompile(`^[A-Za-z0-9_=-][A-Za-z0-9_=.-]{0,127}$`)

// CheckFleetName returns an error unless name is a valid fleet name: a
// lowercase letter, then lowercase letters, digits, '-' or '_' (at most 63).
func CheckFleetName(name string) error {
	if !fleetName.MatchString(name) {
		return fmt.Errorf("fleet name %q: want a lowercase letter, then lowercase letters, digits, '-' or '_' (at most 63)", name)
	}
	return nil
}

// FleetBuckets returns the names of the fleet's files, leases and state
// buckets.
func FleetBuckets(fleet string) (files, leases, state string) {
	b := fleetBucketPrefix + fleet
	return b, b + "-leases", b + "-state"
}

// FleetStore is the fleet's files bucket, its leases and its checkpoints,
// as `surmise fleet` and a fleet daemon use them.
type FleetStore struct {
	name                string
	js                  jetstream.JetStream
	files, leases, cpts jetstream.KeyValue
	replicas            int
}

// OpenFleet binds the buckets of the fleet name on nc, creating the ones
// that do not exist with replicas copies (0: three when nc is connected to
// a cluster, else one). ttl is the leases' time-to-live for a new leases
// bucket (0: lease.DefaultTTL); an existing bucket keeps its own.
func OpenFleet(ctx context.Context, nc *nats.Conn, name string, replicas int, ttl time.Duration) (*FleetStore, error) {
	if err := CheckFleetName(name); err != nil {
		return nil, err
	}
	js, err := jetstream.New(nc)
	if err != nil {
		return nil, fmt.Errorf("fleet %s: %w", name, err)
	}
	if replicas == 0 {
		replicas = 1
		if nc.ConnectedClusterName() != "" {
			replicas = 3
		}
	}
	if ttl == 0 {
		ttl = lease.DefaultTTL
	}
	files, leases, state := FleetBuckets(name)
	s := &FleetStore{name: name, js: js, replicas: replicas}
	for _, b := range []struct {
		kv  *jetstream.KeyValue
		cfg jetstream.KeyValueConfig
	}{
		{&s.files, jetstream.KeyValueConfig{Bucket: files, Description: "surmise fleet " + name + ": plant and gains files",
			History: FleetHistory, Replicas: replicas, Storage: jetstream.FileStorage}},
		// The leases bucket as package lease makes it, but replicated.
		{&s.leases, jetstream.KeyValueConfig{Bucket: leases, Description: "surmise fleet " + name + ": owners of estimators, daemons alive",
			History: 1, TTL: ttl, LimitMarkerTTL: ttl, Replicas: replicas, Storage: jetstream.FileStorage}},
		{&s.cpts, jetstream.KeyValueConfig{Bucket: state, Description: "surmise fleet " + name + ": filter checkpoints",
			History: 1, Replicas: replicas, Storage: jetstream.FileStorage}},
	} {
		kv, err := js.KeyValue(ctx, b.cfg.Bucket)
		if errors.Is(err, jetstream.ErrBucketNotFound) {
			kv, err = js.CreateKeyValue(ctx, b.cfg)
			if errors.Is(err, jetstream.ErrBucketExists) {
				kv, err = js.KeyValue(ctx, b.cfg.Bucket)
			}
		}
		if err != nil {
			return nil, fmt.Errorf("fleet %s: bucket %s: %w", name, b.cfg.Bucket, err)
		}
		*b.kv = kv
	}
	return s, nil
}

// Name returns the fleet's name.
func (s *FleetStore) Name() string { return s.name }

// Replicas returns the number of copies of a bucket this store creates.
func (s *FleetStore) Replicas() int { return s.replicas }

// Put stores the plant file and the gains file of the estimator name and
// returns the revisions of the two entries. The caller has checked them
// (`surmise fleet put` checks them as `surmise check` does). A file equal
// to the one stored is not written again, so that putting a plant with new
// gains changes only the gains (which its owner loads without a restart).
// The gains are written first, so that a daemon that sees a new plant finds
// gains for it.
func (s *FleetStore) Put(ctx context.Context, name string, plant, gains []byte) (plantRev, gainsRev uint64, err error) {
	put := func(key string, data []byte) (uint64, error) {
		cur, err := s.files.Get(ctx, key)
		if err == nil && bytes.Equal(cur.Value(), data) {
			return cur.Revision(), nil
		}
		rev, err := s.files.Put(ctx, key, data)
		if err != nil {
			return 0, fmt.Errorf("fleet %s: storing %s: %w", s.name, key, err)
		}
		return rev, nil
	}
	if gainsRev, err = put(fleetGainsKey+name, gains); err != nil {
		return 0, 0, err
	}
	if plantRev, err = put(fleetPlantKey+name, plant); err != nil {
		return 0, 0, err
	}
	return plantRev, gainsRev, nil
}

// FleetFiles are the stored files of one estimator.
type FleetFiles struct {
	Plant, Gains       []byte
	PlantRev, GainsRev uint64
	Updated            time.Time // the later of the two entries' times
}

// Get returns the stored files of the estimator name; ok is false when it
// has none.
func (s *FleetStore) Get(ctx context.Context, name string) (f FleetFiles, ok bool, err error) {
	p, err := s.files.Get(ctx, fleetPlantKey+name)
	if errors.Is(err, jetstream.ErrKeyNotFound) || errors.Is(err, jetstream.ErrKeyDeleted) {
		return f, false, nil
	}
	if err != nil {
		return f, false, fmt.Errorf("fleet %s: %s: %w", s.name, name, err)
	}
	g, err := s.files.Get(ctx, fleetGainsKey+name)
	if err != nil {
		return f, false, fmt.Errorf("fleet %s: the gains of %s: %w", s.name, name, err)
	}
	f = FleetFiles{Plant: p.Value(), Gains: g.Value(), PlantRev: p.Revision(), GainsRev: g.Revision(), Updated: p.Created()}
	if g.Created().After(f.Updated) {
		f.Updated = g.Created()
	}
	return f, true, nil
}

// Remove deletes the estimator name from the fleet (its owner stops it);
// the deletion is a revision of the history like any change.
func (s *FleetStore) Remove(ctx context.Context, name string) error {
	if _, ok, err := s.Get(ctx, name); err != nil {
		return err
	} else if !ok {
		return fmt.Errorf("fleet %s: no estimator %s", s.name, name)
	}
	for _, k := range []string{fleetPlantKey + name, fleetGainsKey + name} {
		if err := s.files.Delete(ctx, k); err != nil {
			return fmt.Errorf("fleet %s: deleting %s: %w", s.name, k, err)
		}
	}
	return nil
}

// Names returns the estimators of the fleet, sorted.
func (s *FleetStore) Names(ctx context.Context) ([]string, error) {
	lister, err := s.files.ListKeys(ctx)
	if err != nil {
		return nil, fmt.Errorf("fleet %s: %w", s.name, err)
	}
	// The lister stops by itself once it has delivered every key.
	var names []string
	for k := range lister.Keys() {
		if n, ok := strings.CutPrefix(k, fleetPlantKey); ok {
			names = append(names, n)
		}
	}
	slices.Sort(names)
	return names, nil
}

// FleetChange is one revision of the files bucket: the audit trail.
type FleetChange struct {
	Key      string    `json:"key"`
	Revision uint64    `json:"revision"`
	Time     time.Time `json:"time"`
	Op       string    `json:"op"` // put, delete or purge
	Size     int       `json:"size"`
}

// History returns the stored revisions of the estimator name's plant and
// gains, oldest first.
func (s *FleetStore) History(ctx context.Context, name string) ([]FleetChange, error) {
	var out []FleetChange
	for _, k := range []string{fleetPlantKey + name, fleetGainsKey + name} {
		h, err := s.files.History(ctx, k)
		if errors.Is(err, jetstream.ErrKeyNotFound) {
			continue
		}
		if err != nil {
			return nil, fmt.Errorf("fleet %s: history of %s: %w", s.name, k, err)
		}
		for _, e := range h {
			op := "put"
			switch e.Operation() {
			case jetstream.KeyValueDelete:
				op = "delete"
			case jetstream.KeyValuePurge:
				op = "purge"
			}
			out = append(out, FleetChange{Key: e.Key(), Revision: e.Revision(), Time: e.Created(), Op: op, Size: len(e.Value())})
		}
	}
	slices.SortFunc(out, func(a, b FleetChange) int { return int(a.Revision) - int(b.Revision) })
	return out, nil
}

// Owner returns the daemon that holds the estimator name, ok false when
// none does.
func (s *FleetStore) Owner(ctx context.Context, name string) (o lease.Owner, ok bool, err error) {
	e, err := s.leases.Get(ctx, fleetEstimatorKey+name)
	if errors.Is(err, jetstream.ErrKeyNotFound) || errors.Is(err, jetstream.ErrKeyDeleted) {
		return o, false, nil
	}
	if err != nil {
		return o, false, fmt.Errorf("fleet %s: owner of %s: %w", s.name, name, err)
	}
	if err := json.Unmarshal(e.Value(), &o); err != nil {
		return o, false, fmt.Errorf("fleet %s: owner of %s unreadable: %w", s.name, name, err)
	}
	return o, true, nil
}

// Checkpoint returns the latest checkpoint of the estimator name, nil when
// there is none.
func (s *FleetStore) Checkpoint(ctx context.Context, name string) (*Checkpoint, error) {
	e, err := s.cpts.Get(ctx, fleetCheckpointKey+name)
	if errors.Is(err, jetstream.ErrKeyNotFound) || errors.Is(err, jetstream.ErrKeyDeleted) {
		return nil, nil
	}
	if err != nil {
		return nil, fmt.Errorf("fleet %s: checkpoint of %s: %w", s.name, name, err)
	}
	var c Checkpoint
	if err := json.Unmarshal(e.Value(), &c); err != nil {
		return nil, fmt.Errorf("fleet %s: checkpoint of %s unreadable: %w", s.name, name, err)
	}
	return &c, nil
}

// SaveCheckpoint stores c as the latest checkpoint of its estimator.
func (s *FleetStore) SaveCheckpoint(ctx context.Context, c *Checkpoint) error {
	data, err := json.Marshal(c)
	if err != nil {
		return fmt.Errorf("fleet %s: checkpoint of %s: %w", s.name, c.Estimator, err)
	}
	if _, err := s.cpts.Put(ctx, fleetCheckpointKey+c.Estimator, data); err != nil {
		return fmt.Errorf("fleet %s: checkpoint of %s: %w", s.name, c.Estimator, err)
	}
	return nil
}
