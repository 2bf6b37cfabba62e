package pipeline

import (
	"context"
	"errors"
	"net/http"
	"strings"
	"testing"
)

// TestS3CredentialsRefused: a wrong access key or a wrong secret is
// reported as refused credentials (ErrCredentialsRefused), never as a
// missing object, by every call, against a real server (versitygw v1.8.0
// answers an unknown access key with 404 XAdminUserNotFound, a wrong secret
// with 403 SignatureDoesNotMatch, and a HEAD with either with no body at
// all: measured).
func TestS3CredentialsRefused(t *testing.T) {
	r := newS3Rig(t, "hc-creds")
	ctx := context.Background()
	r.put(t, "p/obj.bin", s3Bytes(41, 1000))

	for _, c := range []struct{ name, access, secret string }{
		{"WrongAccessKey", "not-a-known-access-key", r.srv.SecretKey},
		{"WrongSecret", r.srv.AccessKey, "not-the-secret-at-all-0123456789"},
	} {
		t.Run(c.name, func(t *testing.T) {
			t.Setenv("AWS_ACCESS_KEY_ID", c.access)
			t.Setenv("AWS_SECRET_ACCESS_KEY", c.secret)
			s, _ := r.store(t, "p/", StorageConfig{Attempts: 3})
			for _, op := range []struct {
				name, uri string
				run       func() error
			}{
				{"Stat", "s3://hc-creds/p/obj.bin", func() error { _, err := s.Stat(ctx, "obj.bin"); return err }},
				{"StatMissing", "s3://hc-creds/p/none.bin", func() error { _, err := s.Stat(ctx, "none.bin"); return err }},
				{"Open", "s3://hc-creds/p/obj.bin", func() error { _, err := s.Open(ctx, "obj.bin", 0); return err }},
				{"List", "s3://hc-creds/p/", func() error { _, _, err := s3ListKeys(s, ""); return err }},
				{"Put", "s3://hc-creds/p/new.bin", func() error { return Put(ctx, s, "new.bin", []byte("x"), false) }},
				{"PutExclusive", "s3://hc-creds/p/new.bin", func() error { return Put(ctx, s, "new.bin", []byte("x"), true) }},
				{"Delete", "s3://hc-creds/p/obj.bin", func() error { return s.Delete(ctx, "obj.bin") }},
				{"DeleteUnfinished", "s3://hc-creds/p/", func() error { return s.DeleteUnfinished(ctx, "") }},
			} {
				err := op.run()
				r.noSecret(t, err, c.secret)
				switch {
				case err == nil:
					t.Errorf("%s with refused credentials succeeded", op.name)
				case !errors.Is(err, ErrCredentialsRefused) || errors.Is(err, ErrNotFound):
					t.Errorf("%s: %v; want ErrCredentialsRefused and not ErrNotFound", op.name, err)
				case !strings.Contains(err.Error(), "credentials refused") || !strings.Contains(err.Error(), op.uri):
					t.Errorf("%s: error does not say the credentials were refused for %s: %v", op.name, op.uri, err)
				}
			}
			if got := r.get(t, "p/obj.bin"); len(got) != 1000 {
				t.Errorf("the object has %d bytes after a refused Delete, want 1000", len(got))
			}
		})
	}

	t.Run("Accepted", func(t *testing.T) {
		// With the server's keys a missing key is not found, and once the
		// service has answered with success, a HEAD's 404 is taken as it
		// is: one request, no check.
		s, m := r.store(t, "p/", StorageConfig{Attempts: 3})
		if _, err := s.Stat(ctx, "obj.bin"); err != nil {
			t.Fatal(err)
		}
		r.rec.reset(0)
		before := m.Requests.Load()
		_, err := s.Stat(ctx, "none.bin")
		if !errors.Is(err, ErrNotFound) || errors.Is(err, ErrCredentialsRefused) {
			t.Errorf("Stat of a missing key: %v, want ErrNotFound", err)
		}
		if d, n := m.Requests.Load()-before, len(r.rec.requests(anyRequest)); d != 1 || n != 1 {
			t.Errorf("%d requests (%d at the server) for a missing key after a success, want 1", d, n)
		}
		// A fresh store's first answer is a HEAD's 404: one GET of the
		// first byte tells a missing key from refused credentials.
		s2, m2 := r.store(t, "p/", StorageConfig{Attempts: 3})
		r.rec.reset(0)
		_, err = s2.Stat(ctx, "none.bin")
		if !errors.Is(err, ErrNotFound) || errors.Is(err, ErrCredentialsRefused) {
			t.Errorf("first Stat of a missing key: %v, want ErrNotFound", err)
		}
		gets := r.rec.requests(func(q s3Seen) bool { return q.Method == http.MethodGet && q.Range == "bytes=0-0" })
		if q := m2.Requests.Load(); q != 2 || len(gets) != 1 {
			t.Errorf("%d requests, %d ranged GETs of the first byte; want 2 (HEAD, GET) and 1", q, len(gets))
		}
	})
}
