package arms_test

import (
	"strings"
	"testing"

	"trialogue/arms"
)

// TestFromCanonical: a version rebuilt from its stored canonical form has
// the same hash and the same allocation scheme as the file it came from.
func TestFromCanonical(t *testing.T) {
	s, _, err := arms.ParseFile("../testdata/demo-study.yaml")
	if err != nil {
		t.Fatal(err)
	}
	c, err := s.Canonical()
	if err != nil {
		t.Fatal(err)
	}
	back, err := arms.FromCanonical(c)
	if err != nil {
		t.Fatal(err)
	}
	h1, _ := s.Hash()
	h2, err := back.Hash()
	if err != nil || h1 != h2 {
		t.Fatalf("got hash %s (%v), want %s", h2, err, h1)
	}
	a, b := s.Scheme(), back.Scheme()
	if len(a.Arms) != len(b.Arms) {
		t.Fatalf("got %d arms, want %d", len(b.Arms), len(a.Arms))
	}
	for i := range a.Arms {
		if a.Arms[i] != b.Arms[i] {
			t.Fatalf("arm %d: got %+v, want %+v", i, b.Arms[i], a.Arms[i])
		}
	}
	t.Run("ErrUnknownField", func(t *testing.T) {
		bad := strings.Replace(string(c), `"arm_order"`, `"arm_orders"`, 1)
		if _, err := arms.FromCanonical([]byte(bad)); err == nil {
			t.Fatal("got nil error for an unknown field")
		}
	})
	t.Run("ErrArmOrderMismatch", func(t *testing.T) {
		bad := strings.Replace(string(c), `"arm_order":["notice",`, `"arm_order":["nothing",`, 1)
		if _, err := arms.FromCanonical([]byte(bad)); err == nil || !strings.Contains(err.Error(), "nothing") {
			t.Fatalf("got %v, want an error naming the unknown arm", err)
		}
	})
}
