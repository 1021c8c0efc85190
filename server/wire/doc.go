// Package wire is the codec between the wire API (package reckonv1) and the
// fusion layer: configuration and sample conversion with errors that name
// the field, the YAML configuration file, JSON Lines of samples and the
// journal format. It has no goroutines; its only I/O is through the readers,
// writers and files it is handed.
//
// Both the server and the offline tools of package clients use it, so that
// the service and a replay decode the same bytes the same way.
package wire
