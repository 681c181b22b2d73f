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

// TestTrialRender: a template that fails for some respondents fails the
// check, with the arm's position; the guarded form passes.
func TestTrialRender(t *testing.T) {
	study := func(system string) string {
		return `id: fernby-library
title: Fernby library hours
covariates:
  - {name: lean, type: choice, values: [left, right], required: true}
  - {name: age, type: integer, min: 18, max: 99}
allocation: {blocks: [1], arms: {talk: 1}}
endpoints:
  bot: {kind: scripted}
arms:
  talk:
    kind: chat
    endpoint: bot
    replies: {min: 1, max: 2}
    system: "` + system + `"
return: "https://survey.example.org/r?code={{.code}}"
`
	}
	t.Run("ErrUnguardedOptionalCovariate", func(t *testing.T) {
		_, err := arms.Parse("f.yaml", []byte(study(`You talk with a {{if gt .age 60}}senior{{end}} resident.`)))
		if err == nil || !strings.Contains(err.Error(), "f.yaml:10:3:") || !strings.Contains(err.Error(), "no optional covariates") {
			t.Fatalf("got %v, want an error at f.yaml:10:3 naming the missing optional covariate", err)
		}
	})
	t.Run("OKGuarded", func(t *testing.T) {
		// Go's text/template documentation: "and" stops at the first empty argument.
		if _, err := arms.Parse("f.yaml", []byte(study(`You talk with a {{if and .age (gt .age 60)}}senior{{end}} resident.`))); err != nil {
			t.Fatalf("got %v, want no error", err)
		}
	})
}
