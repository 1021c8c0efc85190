// Package convert translates between the wire API (package reckonv1) and the
// fusion layer, and reads and writes the project's two file formats for
// people: the YAML robot configuration and JSON Lines of samples.
//
// Conversions name the offending field in their errors. The package starts
// no goroutines and opens no files: its only I/O is through the readers and
// writers it is handed. The service and the offline tools both use it, so
// that a replay decodes the same bytes the same way as the service did and
// fills every response field alike, the status code included (as a
// google.rpc.Code number: gRPC itself stays in package server).
package convert
