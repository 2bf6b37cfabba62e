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
// u < train, val when u < train + val, else test. The comparison is done
// exactly on integers (x < ⌈f·2^64⌉), since turning x into a float64 would
// round keys near a threshold across it.
func SplitOf(key string, s SplitConfig) string {
	h := sha256.Sum256([]byte(key))
	x := binary.BigEndian.Uint64(h[:8])
	switch {
	case below(x, s.Train):
		return "train"
	case below(x, s.Train+s.Val):
		return "val"
	}
	return "test"
}

// below reports x / 2^64 < f exactly.
func below(x uint64, f float64) bool {
	if f <= 0 {
		return false
	}
	t := math.Ceil(math.Ldexp(f, 64)) // exact: scaling by a power of two
	if t >= math.Ldexp(1, 64) {
		return true
	}
	return x < uint64(t)
}

// Splits lists the split names in output order.
func Splits() []string { return []string{"train", "val", "test"} }
