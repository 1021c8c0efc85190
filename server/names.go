package server

import (
	"fmt"
	"strings"

	"reckon.example/server/journal"
)

// idForm says what journal.ValidID takes.
const idForm = "1 to 63 lower-case letters, digits and hyphens, starting with a letter"

// namePrefix starts every robot's resource name.
const namePrefix = "robots/"

// RobotName returns the resource name "robots/{id}" of the robot with id.
func RobotName(id string) string { return namePrefix + id }

// RobotID returns the {robot} part of a resource name "robots/{robot}",
// or an error when name is not of that form with a valid id
// (journal.ValidID: the id names the robot's journal files).
func RobotID(name string) (string, error) {
	id, ok := strings.CutPrefix(name, namePrefix)
	if !ok || !journal.ValidID(id) {
		return "", fmt.Errorf("%q is not a robot name: robots/ and an id of %s", name, idForm)
	}
	return id, nil
}
