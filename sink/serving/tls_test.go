package serving

import (
	"context"
	"crypto/ecdsa"
	"crypto/elliptic"
	"crypto/rand"
	"crypto/tls"
	"crypto/x509"
	"crypto/x509/pkix"
	"encoding/pem"
	"math/big"
	"net"
	"os"
	"path/filepath"
	"strconv"
	"strings"
	"testing"
	"time"

	"github.com/redis/go-redis/v9"

	"freshet.dev/freshet/online"
)

func TestMain(m *testing.M) {
	// go-redis logs every failed dial; the outage test makes hundreds.
	redis.SetLogger(quietLogger{})
	os.Exit(m.Run())
}

type quietLogger struct{}

func (quietLogger) Printf(context.Context, string, ...any) {}

// pki is a throwaway CA with one server and one client certificate.
type pki struct {
	dir                       string
	caFile, certFile, keyFile string
	pool                      *x509.CertPool
	client                    tls.Certificate
	otherClient               tls.Certificate // signed by another CA
}

func newPKI(t *testing.T) *pki {
	t.Helper()
	p := &pki{dir: t.TempDir()}
	caKey, caCert, caDER := makeCA(t, "freshet test CA")
	p.pool = x509.NewCertPool()
	p.pool.AddCert(caCert)
	p.caFile = writePEM(t, p.dir, "ca.crt", "CERTIFICATE", caDER)

	srvKey, srvDER := makeLeaf(t, caKey, caCert, "127.0.0.1", x509.ExtKeyUsageServerAuth)
	p.certFile = writePEM(t, p.dir, "server.crt", "CERTIFICATE", srvDER)
	kb, _ := x509.MarshalECPrivateKey(srvKey)
	p.keyFile = writePEM(t, p.dir, "server.key", "EC PRIVATE KEY", kb)

	cliKey, cliDER := makeLeaf(t, caKey, caCert, "freshet-client", x509.ExtKeyUsageClientAuth)
	p.client = tls.Certificate{Certificate: [][]byte{cliDER}, PrivateKey: cliKey}

	otherKey, otherCA, _ := makeCA(t, "some other CA")
	oKey, oDER := makeLeaf(t, otherKey, otherCA, "intruder", x509.ExtKeyUsageClientAuth)
	p.otherClient = tls.Certificate{Certificate: [][]byte{oDER}, PrivateKey: oKey}
	return p
}

func makeCA(t *testing.T, name string) (*ecdsa.PrivateKey, *x509.Certificate, []byte) {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(1), Subject: pkix.Name{CommonName: name},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		IsCA: true, BasicConstraintsValid: true, KeyUsage: x509.KeyUsageCertSign | x509.KeyUsageDigitalSignature,
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, tmpl, &key.PublicKey, key)
	if err != nil {
		t.Fatal(err)
	}
	cert, _ := x509.ParseCertificate(der)
	return key, cert, der
}

func makeLeaf(t *testing.T, caKey *ecdsa.PrivateKey, ca *x509.Certificate, name string, use x509.ExtKeyUsage) (*ecdsa.PrivateKey, []byte) {
	key, err := ecdsa.GenerateKey(elliptic.P256(), rand.Reader)
	if err != nil {
		t.Fatal(err)
	}
	tmpl := &x509.Certificate{
		SerialNumber: big.NewInt(time.Now().UnixNano()), Subject: pkix.Name{CommonName: name},
		NotBefore: time.Now().Add(-time.Hour), NotAfter: time.Now().Add(time.Hour),
		KeyUsage: x509.KeyUsageDigitalSignature, ExtKeyUsage: []x509.ExtKeyUsage{use},
	}
	if ip := net.ParseIP(name); ip != nil {
		tmpl.IPAddresses = []net.IP{ip}
	}
	der, err := x509.CreateCertificate(rand.Reader, tmpl, ca, &key.PublicKey, caKey)
	if err != nil {
		t.Fatal(err)
	}
	return key, der
}

func writePEM(t *testing.T, dir, name, typ string, der []byte) string {
	path := filepath.Join(dir, name)
	if err := os.WriteFile(path, pem.EncodeToMemory(&pem.Block{Type: typ, Bytes: der}), 0o600); err != nil {
		t.Fatal(err)
	}
	return path
}

// TestTLS publishes through a TLS-only test-owned redis-server that requires
// client certificates; a client without a trusted certificate is refused with
// a clear error.
func TestTLS(t *testing.T) {
	p := newPKI(t)
	port := freePort(t)
	good := &tls.Config{RootCAs: p.pool, Certificates: []tls.Certificate{p.client}, MinVersion: tls.VersionTLS12}
	ready := func() error {
		c := redis.NewClient(&redis.Options{Addr: "127.0.0.1:" + strconv.Itoa(port), TLSConfig: good, DialTimeout: time.Second})
		defer c.Close()
		return c.Ping(context.Background()).Err()
	}
	srv := startServer(t, port, []string{"--port", "0", "--tls-port", strconv.Itoa(port),
		"--tls-cert-file", p.certFile, "--tls-key-file", p.keyFile, "--tls-ca-cert-file", p.caFile,
		"--tls-auth-clients", "yes"}, ready)

	m := newFakeModel(300, 50, 8, online.Explicit, 7)
	w := newWriter(t, Options{Addrs: []string{srv.addr()}, TLS: good, Prefix: "tls", Mode: online.Explicit})
	publishFull(t, w, m)
	waitFor(t, 10*time.Second, "published over TLS", func() bool { return w.Status().Version != 0 })
	c := redis.NewClient(&redis.Options{Addr: srv.addr(), TLSConfig: good})
	defer c.Close()
	_, got := readAll(t, c, "tls")
	compareModel(t, m, got)

	// Plain TCP to the TLS port, a client certificate from another CA, and
	// no trust in the server's CA all fail, each with a telling error.
	cases := []struct {
		name string
		cfg  *tls.Config
		want []string
	}{
		{"plaintext", nil, []string{"EOF", "reset", "i/o timeout"}},
		{"untrusted client cert", &tls.Config{RootCAs: p.pool, Certificates: []tls.Certificate{p.otherClient}}, []string{"tls", "certificate", "EOF", "reset"}},
		{"unknown server CA", &tls.Config{Certificates: []tls.Certificate{p.client}}, []string{"certificate signed by unknown authority"}},
	}
	for _, tc := range cases {
		_, err := OpenRestore(context.Background(), Options{Addrs: []string{srv.addr()}, TLS: tc.cfg, Prefix: "tls", WriteTimeout: 2 * time.Second})
		if err == nil {
			t.Fatalf("%s: restore succeeded", tc.name)
		}
		ok := false
		for _, s := range tc.want {
			ok = ok || strings.Contains(err.Error(), s)
		}
		if !ok {
			t.Fatalf("%s: error %q mentions none of %q", tc.name, err, tc.want)
		}
		t.Logf("%s: %v", tc.name, err)
	}
}
