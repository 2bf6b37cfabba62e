package pipeline

import (
	"crypto/sha256"
	"encoding/binary"
	"math"
)

// PartitionOf is SPEC §3.4: BE_uint64(sha256(unit)[0:8]) mod partitions. A
// unit's frames all land in one partition, so episodes never cross partitions.
func PartitionOf(unit string, partitions int) int {
	h := sha256.Sum256([]byte(unit))
	return int(binary.BigEndian.Uint64(h[:8]) % uint64(partitions))
}

// SplitOf is SPEC §3.4: u = BE_uint64(sha256(key)[0:8]) / 2^64; train when
// u < train, val when u < train + val, else test.
func SplitOf(key string, s SplitConfig) string {
	h := sha256.Sum256([]byte(key))
	u := float64(binary.BigEndian.Uint64(h[:8])) / math.Exp2(64)
	switch {
	case u < s.Train:
		return "train"
	case u < s.Train+s.Val:
		return "val"
	}
	return "test"
}

// Splits lists the split names in output order.
func Splits() []string { return []string{"train", "val", "test"} }
