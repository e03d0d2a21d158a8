package intake

import (
	"context"
	"encoding/json"
	"fmt"
	"slices"
	"time"

	"github.com/segmentio/kafka-go"
)

// Several instances in one consumer group split a topic's partitions; the
// state of a partition follows it from instance to instance through a
// checkpoint store they share. The intake's side of that is here: it tells
// an Owner which partitions this instance holds, generation by generation,
// and it learns from Kafka itself which instance holds which partition and
// where that instance answers — each member's address travels as the user
// data of its group membership, and any member reads every member's with
// DescribeGroups. No registry of tidemark's own is involved.

// Generation is one consumer-group generation as this instance sees it.
type Generation struct {
	ID       int32  // the coordinator's generation ID: it grows with every rebalance
	MemberID string // this instance's member ID in the group
}

// Owner is what the Kafka intake tells, in group mode (Kafka.SetOwner),
// about the partitions this instance owns. Both calls come from the
// intake's goroutines and must return before it goes on.
type Owner interface {
	// Assigned is called at the start of each generation, before any of
	// parts is read: this instance owns parts until Revoked. It returns,
	// per partition, the last offset the state covers (absent: none, read
	// from the first offset); an error ends the generation, and the intake
	// rejoins the group.
	Assigned(gen Generation, parts []int32) (map[int32]int64, error)
	// Revoked is called when the generation ends (a rebalance, a lost
	// coordinator, shutdown) once every reader of parts has stopped, and
	// before the group is rejoined or left: the owner checkpoints the
	// partitions now, so that their next owner resumes where this one
	// stopped.
	Revoked(gen Generation, parts []int32)
}

// Member is one instance of the consumer group.
type Member struct {
	ID         string  `json:"member_id"`
	Instance   string  `json:"instance"` // its name (--instance)
	Address    string  `json:"address"`  // where it answers HTTP, e.g. http://10.0.0.7:8080
	Partitions []int32 `json:"partitions"`
}

// memberData is what a member publishes about itself in the group.
type memberData struct {
	Instance string `json:"instance"`
	Address  string `json:"address"`
}

// memberBalancer is kafka-go's range assignment, with this instance's
// address as the membership's user data. The protocol keeps the range
// balancer's name, so that every member agrees on it.
type memberBalancer struct {
	kafka.RangeGroupBalancer
	data []byte
}

func (b memberBalancer) UserData() ([]byte, error) { return b.data, nil }

// SetOwner puts the intake in group mode: partitions are read from the
// offsets owner returns when they are assigned, and handed back to it when
// they are revoked. instance and address are what other members learn of
// this one. Call it before Run.
func (k *Kafka) SetOwner(owner Owner, instance, address string) {
	data, _ := json.Marshal(memberData{Instance: instance, Address: address})
	k.mu.Lock()
	defer k.mu.Unlock()
	k.owner, k.self = owner, data
}

// Members returns the group's members as last read, in member-ID order,
// and when they were read (zero before the first read). A member whose
// partitions are empty holds none — during a rebalance, all of them.
func (k *Kafka) Members() ([]Member, time.Time) {
	k.mu.Lock()
	defer k.mu.Unlock()
	return k.members, k.membersAt
}

// Partitions returns how many partitions the topic has (0 before the brokers
// first answered).
func (k *Kafka) Partitions() int {
	k.mu.Lock()
	defer k.mu.Unlock()
	return k.numParts
}

// Generation returns the generation this instance is in, and whether it is
// in one.
func (k *Kafka) Generation() (Generation, bool) {
	k.mu.Lock()
	defer k.mu.Unlock()
	if k.gen == nil {
		return Generation{}, false
	}
	return Generation{ID: k.gen.ID, MemberID: k.gen.MemberID}, true
}

// refreshMembers reads the group's members, their addresses and partitions.
func (k *Kafka) refreshMembers(ctx context.Context) error {
	ctx, cancel := context.WithTimeout(ctx, 2*time.Second)
	defer cancel()
	res, err := k.client.DescribeGroups(ctx, &kafka.DescribeGroupsRequest{GroupIDs: []string{k.cfg.Group}})
	if err != nil {
		return err
	}
	if len(res.Groups) != 1 {
		return fmt.Errorf("kafka: describing group %q: %d groups in the answer", k.cfg.Group, len(res.Groups))
	}
	g := res.Groups[0]
	if g.Error != nil {
		return fmt.Errorf("kafka: describing group %q: %w", k.cfg.Group, g.Error)
	}
	var members []Member
	for _, m := range g.Members {
		var d memberData
		json.Unmarshal(m.MemberMetadata.UserData, &d) // a member of another program has none
		mb := Member{ID: m.MemberID, Instance: d.Instance, Address: d.Address, Partitions: []int32{}}
		if g.GroupState == "Stable" {
			for _, t := range m.MemberAssignments.Topics {
				if t.Topic == k.cfg.Topic {
					for _, p := range t.Partitions {
						mb.Partitions = append(mb.Partitions, int32(p))
					}
				}
			}
		}
		slices.Sort(mb.Partitions)
		members = append(members, mb)
	}
	slices.SortFunc(members, func(a, b Member) int {
		if a.ID < b.ID {
			return -1
		}
		if a.ID > b.ID {
			return 1
		}
		return 0
	})
	k.mu.Lock()
	k.members, k.membersAt = members, time.Now()
	k.mu.Unlock()
	return nil
}

// Partitioner maps a key to the partition a producer would have written it
// to, so that a predict for a key is answered by the instance that learned
// it. The function must match the producers' partitioner.
type Partitioner func(key string, partitions int) int32

// Partitioners are the key-to-partition functions tidemark knows, by the
// name --kafka-partitioner takes; each is kafka-go's implementation of a
// producer's own:
//
//   - murmur2: the Java client's default for keyed messages
//     (toPositive(murmur2(key)) mod partitions), also librdkafka's
//     "murmur2_random". The default.
//   - fnv1a: FNV-1a 32 of the key mod partitions (sarama's default hash
//     partitioner, kafka-go's Hash balancer).
//   - crc32: CRC-32 of the key mod partitions (librdkafka's default,
//     "consistent_random").
var Partitioners = map[string]Partitioner{
	"murmur2": balancerPartitioner(kafka.Murmur2Balancer{Consistent: true}),
	"fnv1a":   balancerPartitioner(&kafka.Hash{}),
	"crc32":   balancerPartitioner(kafka.CRC32Balancer{Consistent: true}),
}

// DefaultPartitioner names the default of Partitioners.
const DefaultPartitioner = "murmur2"

func balancerPartitioner(b kafka.Balancer) Partitioner {
	return func(key string, n int) int32 {
		parts := make([]int, n)
		for i := range parts {
			parts[i] = i
		}
		return int32(b.Balance(kafka.Message{Key: []byte(key)}, parts...))
	}
}
