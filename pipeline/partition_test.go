package pipeline

import (
	"crypto/sha256"
	"fmt"
	"math"
	"math/big"
	"testing"
)

// The tests of SPEC §3.4, against the formula computed here with exact
// arithmetic: the 8-byte prefix of SHA-256 read as a big-endian integer x
// (math/big), partition x mod partitions, and u = x/2^64 compared with the
// split fractions as exact rationals (u < f ⟺ x < f·2^64, f being the
// float64 the config holds).

// partitionPrefix is BE_uint64(sha256(s)[0:8]) as a big integer.
func partitionPrefix(s string) *big.Int {
	h := sha256.Sum256([]byte(s))
	return new(big.Int).SetBytes(h[:8])
}

// partitionSplitExact is SPEC §3.4's split in exact arithmetic.
func partitionSplitExact(key string, s SplitConfig) string {
	x := new(big.Rat).SetInt(partitionPrefix(key))
	two64 := new(big.Rat).SetInt(new(big.Int).Lsh(big.NewInt(1), 64))
	train := new(big.Rat).Mul(new(big.Rat).SetFloat64(s.Train), two64)
	trainVal := new(big.Rat).Mul(new(big.Rat).Add(new(big.Rat).SetFloat64(s.Train), new(big.Rat).SetFloat64(s.Val)), two64)
	switch {
	case x.Cmp(train) < 0:
		return "train"
	case x.Cmp(trainVal) < 0:
		return "val"
	}
	return "test"
}

// partitionKeys is n keys shaped like episode ids and units.
func partitionKeys(n int) []string {
	keys := make([]string, 0, n)
	for i := range n {
		switch i % 3 {
		case 0:
			keys = append(keys, fmt.Sprintf("picker-%03d-%d", i%97, 1_700_000_000_000_000_000+int64(i)*1_000_003))
		case 1:
			keys = append(keys, fmt.Sprintf("unit%d", i))
		default:
			keys = append(keys, fmt.Sprintf("AV.%d_x-%d", i*7919, i))
		}
	}
	return append(keys, "", "a", "-", "0")
}

func TestPartitionOf(t *testing.T) {
	for _, parts := range []int{1, 2, 3, 7, 8, 64, 1000, math.MaxInt32} {
		m := big.NewInt(int64(parts))
		for _, k := range partitionKeys(3000) {
			want := new(big.Int).Mod(partitionPrefix(k), m).Int64()
			if got := PartitionOf(k, parts); int64(got) != want {
				t.Fatalf("PartitionOf(%q, %d) = %d, want %d", k, parts, got, want)
			}
		}
	}
	// A worked value: sha256("") = e3b0c44298fc1c14… (the SHA-256 of the
	// empty message, from memory), so x = 0xe3b0c44298fc1c14; its last byte
	// 0x14 = 20 gives x mod 8 = 20 mod 8 = 4 and x mod 2 = 0.
	if got := PartitionOf("", 8); got != 4 {
		t.Errorf("PartitionOf(\"\", 8) = %d, want 0xe3b0c44298fc1c14 mod 8 = 4", got)
	}
	if got := PartitionOf("", 2); got != 0 {
		t.Errorf("PartitionOf(\"\", 2) = %d, want 0", got)
	}
}

func TestSplitOf(t *testing.T) {
	configs := []SplitConfig{
		{Train: 0.8, Val: 0.1, Test: 0.1},
		{Train: 1, Val: 0, Test: 0},
		{Train: 0, Val: 0, Test: 1},
		{Train: 0.5, Val: 0.5, Test: 0},
		{Train: 0, Val: 1, Test: 0},
		{Train: 0.7, Val: 0.2, Test: 0.1},
		{Train: 1.0 / 3, Val: 1.0 / 3, Test: 1.0 / 3},
	}
	keys := partitionKeys(4000)
	for _, s := range configs {
		seen := map[string]int{}
		for _, k := range keys {
			want := partitionSplitExact(k, s)
			if got := SplitOf(k, s); got != want {
				t.Errorf("SplitOf(%q, %+v) = %s, want %s", k, s, got, want)
			}
			seen[want]++
		}
		// The degenerate configs put everything in one split.
		for split, frac := range map[string]float64{"train": s.Train, "val": s.Val, "test": s.Test} {
			if frac == 0 && seen[split] != 0 {
				t.Errorf("%+v: %d keys in %s", s, seen[split], split)
			}
			if frac == 1 && seen[split] != len(keys) {
				t.Errorf("%+v: %d of %d keys in %s", s, seen[split], len(keys), split)
			}
		}
	}
	// A worked value: x("") = 0xe3b0c44298fc1c14 (see TestPartitionOf), so
	// u ≈ 0xe3b0c442 / 2^32 = 3820012610 / 4294967296 = 0.88941; under
	// 0.8/0.1/0.1, 0.8 ≤ u < 0.9: val; under 0.8/0.05/0.15, u ≥ 0.85: test.
	if got := SplitOf("", SplitConfig{Train: 0.8, Val: 0.1, Test: 0.1}); got != "val" {
		t.Errorf("SplitOf(\"\", 0.8/0.1/0.1) = %s, want val (u = 0.88941)", got)
	}
	if got := SplitOf("", SplitConfig{Train: 0.8, Val: 0.05, Test: 0.15}); got != "test" {
		t.Errorf("SplitOf(\"\", 0.8/0.05/0.15) = %s, want test (u = 0.88941)", got)
	}
}

func TestSplitFractionOfTrain(t *testing.T) {
	// 20,000 keys with P(train) = 0.8: the train count is binomial with
	// mean 16,000 and standard deviation √(20000·0.8·0.2) = 56.57; accept
	// 4 standard deviations, 16,000 ± 226.
	s := SplitConfig{Train: 0.8, Val: 0.1, Test: 0.1}
	counts := map[string]int{}
	for i := range 20000 {
		counts[SplitOf(fmt.Sprintf("unit-%d-%d", i%250, 1_700_000_000_000_000_000+int64(i)*100_000_000), s)]++
	}
	const n, p = 20000, 0.8
	sd := math.Sqrt(n * p * (1 - p))
	if d := math.Abs(float64(counts["train"]) - n*p); d > 4*sd {
		t.Errorf("train: %d of 20000, %.0f from 16000 (4σ = %.0f)", counts["train"], d, 4*sd)
	}
	// Val and test, p = 0.1 each: σ = √(20000·0.1·0.9) = 42.43, 2000 ± 170.
	for _, split := range []string{"val", "test"} {
		if d := math.Abs(float64(counts[split]) - 2000); d > 4*math.Sqrt(20000*0.1*0.9) {
			t.Errorf("%s: %d of 20000, %.0f from 2000", split, counts[split], d)
		}
	}
	if counts["train"]+counts["val"]+counts["test"] != 20000 {
		t.Errorf("splits %v do not add up to 20000", counts)
	}
}

func TestSplitsOrder(t *testing.T) {
	got := Splits()
	if len(got) != 3 || got[0] != "train" || got[1] != "val" || got[2] != "test" {
		t.Errorf("Splits() = %v, want [train val test]", got)
	}
}
