package daemon

import (
	"crypto/tls"
	"crypto/x509"
	"fmt"
	"log/slog"
	"net"
	"time"
)

// loopbackAddr tells whether a listen address ("host:port") binds to this
// machine only: "localhost" or a loopback IP. An empty host or an
// unspecified IP (0.0.0.0, ::) binds every interface.
func loopbackAddr(addr string) bool {
	host, _, err := net.SplitHostPort(addr)
	if err != nil {
		return false
	}
	if host == "localhost" {
		return true
	}
	ip := net.ParseIP(host)
	return ip != nil && ip.IsLoopback()
}

// checkExposure refuses to serve off loopback without protection: the gRPC
// listener needs TLS or Insecure, and the metrics listener (which has no
// TLS) needs Insecure. A metrics address without a host binds loopback.
func checkExposure(dc *Config) error {
	if !loopbackAddr(dc.Listen) && dc.TLSCert == "" && !dc.Insecure {
		return fmt.Errorf("listen %s is not a loopback address: serving it needs TLS (-tls-cert and -tls-key) or -insecure to serve in plain text", dc.Listen)
	}
	if dc.MetricsListen == "" {
		return nil
	}
	if host, port, err := net.SplitHostPort(dc.MetricsListen); err == nil && host == "" {
		dc.MetricsListen = net.JoinHostPort("127.0.0.1", port)
	}
	if !loopbackAddr(dc.MetricsListen) && !dc.Insecure {
		return fmt.Errorf("metrics-listen %s is not a loopback address: metrics are served in plain text, which needs -insecure", dc.MetricsListen)
	}
	return nil
}

// expiryWarning is how long before its end a certificate is reported.
const expiryWarning = 30 * 24 * time.Hour

// logCertExpiry logs a server certificate that has expired or expires
// within expiryWarning of now.
func logCertExpiry(log *slog.Logger, tc *tls.Config, now time.Time) {
	for _, c := range tc.Certificates {
		leaf := c.Leaf
		if leaf == nil && len(c.Certificate) > 0 {
			leaf, _ = x509.ParseCertificate(c.Certificate[0])
		}
		if leaf == nil {
			continue
		}
		switch left := leaf.NotAfter.Sub(now); {
		case left <= 0:
			log.Error("server certificate has expired", "subject", leaf.Subject.String(), "not_after", leaf.NotAfter)
		case left < expiryWarning:
			log.Warn("server certificate expires soon", "subject", leaf.Subject.String(), "not_after", leaf.NotAfter, "days_left", int(left.Hours()/24))
		}
	}
}
