package main

import (
	"crypto/tls"
	"crypto/x509"
	"flag"
	"fmt"
	"strings"

	"reckon.example/clients/client"
	"reckon.example/server/daemon"
)

// connFlags are the flags every command that talks to the service shares.
type connFlags struct {
	addr, tokenFile, ca, cert, key, serverName *string
}

func addConnFlags(fs *flag.FlagSet) connFlags {
	return connFlags{
		addr:       fs.String("addr", "127.0.0.1:7460", "service address host:port"),
		tokenFile:  fs.String("token-file", "", "file holding the bearer token"),
		ca:         fs.String("tls-ca", "", "PEM file of the CA that signed the server's certificate (turns TLS on)"),
		cert:       fs.String("tls-cert", "", "client certificate PEM file, for mutual TLS"),
		key:        fs.String("tls-key", "", "client key PEM file, for mutual TLS"),
		serverName: fs.String("tls-server-name", "", "server name to verify (default: the host of -addr)"),
	}
}

func (c connFlags) dial() (*client.Client, error) {
	var opt client.Options
	if *c.tokenFile != "" {
		b, err := daemon.ReadFlagFile(*c.tokenFile)
		if err != nil {
			return nil, fmt.Errorf("token-file: %w", err)
		}
		opt.Token = strings.TrimSpace(string(b))
	}
	if *c.ca != "" {
		pem, err := daemon.ReadFlagFile(*c.ca)
		if err != nil {
			return nil, fmt.Errorf("tls-ca: %w", err)
		}
		pool := x509.NewCertPool()
		if !pool.AppendCertsFromPEM(pem) {
			return nil, fmt.Errorf("tls-ca: %s holds no PEM certificate", *c.ca)
		}
		opt.TLS = &tls.Config{RootCAs: pool, ServerName: *c.serverName, MinVersion: tls.VersionTLS12}
		if *c.cert != "" {
			certPEM, err := daemon.ReadFlagFile(*c.cert)
			if err != nil {
				return nil, fmt.Errorf("tls-cert: %w", err)
			}
			keyPEM, err := daemon.ReadFlagFile(*c.key)
			if err != nil {
				return nil, fmt.Errorf("tls-key: %w", err)
			}
			pair, err := tls.X509KeyPair(certPEM, keyPEM)
			if err != nil {
				return nil, fmt.Errorf("tls-cert/tls-key: %w", err)
			}
			opt.TLS.Certificates = []tls.Certificate{pair}
		}
	}
	return client.Dial(*c.addr, opt)
}
