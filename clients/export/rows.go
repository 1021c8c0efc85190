package export

// The rows of the four tables. Every table starts with robot and run, the
// key of a run; inputs, poses and events carry the input's sequence number,
// which joins them. Column names carry their units (_ns nanoseconds, _m
// metres, _rad radians, _m2 square metres, _m_rad metre-radians, _rad2
// square radians, _s seconds); stamps without "unix" are on the robot's
// own time base, as its samples carry them. Labels are those of package
// fusion's label tables ("applied", "too_old", "position_uncertain").

// RunRow is one row of runs.parquet: one run of a journal (the live one of
// a robot or one set aside when the robot was deleted). A journal holds one
// run per controller boot: a run start begins the next (DEVELOPERS.md,
// "Design: Runs").
type RunRow struct {
	// Robot is the robot id ("cart").
	Robot string `parquet:"robot,dict"`
	// Run is the run's key: the journal's name (Journal) for its first
	// run, "{journal}/{n}" for run n from the second on.
	Run string `parquet:"run,dict"`
	// Journal is "live" for the robot's journal, or "deleted-{unix ns}"
	// for one set aside when the robot was deleted at that time.
	Journal string `parquet:"journal,dict"`
	// RunNumber is the run's number in its journal, from 1; BootID the
	// boot id of its run start ("" for run 1).
	RunNumber int64  `parquet:"run_number"`
	BootID    string `parquet:"boot_id"`
	// Deleted says that the journal was set aside by a delete.
	Deleted bool `parquet:"deleted"`
	// CreateTimeUnixNs is when the robot was created (the opening record),
	// Unix nanoseconds.
	CreateTimeUnixNs int64 `parquet:"create_time_unix_ns"`
	// DeleteTimeUnixNs is when it was deleted, Unix nanoseconds (null for
	// the live journal).
	DeleteTimeUnixNs *int64 `parquet:"delete_time_unix_ns,optional"`
	// FirstStampNs and LastStampNs are the smallest and largest sample
	// stamps of the run, nanoseconds on its own clock (0 with no inputs; a
	// run start has no stamp).
	FirstStampNs int64 `parquet:"first_stamp_ns"`
	LastStampNs  int64 `parquet:"last_stamp_ns"`
	// Inputs counts the journaled inputs (a run's run start is its first);
	// Odometry, Headings, Fixes and Reseeds count them by kind.
	Inputs   int64 `parquet:"inputs"`
	Odometry int64 `parquet:"odometry"`
	Headings int64 `parquet:"headings"`
	Fixes    int64 `parquet:"fixes"`
	Reseeds  int64 `parquet:"reseeds"`
	// Applied, Held, Gated, TooOld and Invalid count the inputs by final
	// verdict (a held fix counts as what it became; Held counts those still
	// held at the end).
	Applied int64 `parquet:"applied"`
	Held    int64 `parquet:"held"`
	Gated   int64 `parquet:"gated"`
	TooOld  int64 `parquet:"too_old"`
	Invalid int64 `parquet:"invalid"`
	// Events counts the rows of events.parquet for the run.
	Events int64 `parquet:"events"`
	// DistrustedNs is the time the pose was not trusted, nanoseconds: the
	// sum, over consecutive poses, of the stamp difference to the next
	// pose when the first of the two is distrusted.
	DistrustedNs int64 `parquet:"distrusted_ns"`
	// Differs counts the inputs whose replayed response differs from the
	// one recorded (0 when the replay reproduces the run).
	Differs int64 `parquet:"differs"`
	// Torn, Damaged and Gap are of the journal, on each of its runs' rows.
	// Torn says the journal's tail was cut short by a crash (what was
	// acknowledged before it is exported).
	Torn bool `parquet:"torn"`
	// Damaged counts the damaged byte ranges the read skipped.
	Damaged int32 `parquet:"damaged"`
	// Gap is the first continuity break found (missing inputs or
	// segments), empty when none; the inputs after it are exported too.
	Gap string `parquet:"gap"`
	// IMUMode, Wheels, Landmarks, GateProbability, WindowNs,
	// MaxPosition95M and MaxHeadingStdRad summarise the configuration;
	// ConfigJSON is all of it, as the wire API's JSON.
	IMUMode          string  `parquet:"imu_mode,dict"`
	Wheels           int32   `parquet:"wheels"`
	Landmarks        int32   `parquet:"landmarks"`
	GateProbability  float64 `parquet:"gate_probability"`
	WindowNs         int64   `parquet:"window_ns"`
	MaxPosition95M   float64 `parquet:"max_position95_m"`
	MaxHeadingStdRad float64 `parquet:"max_heading_std_rad"`
	ConfigJSON       string  `parquet:"config_json"`
}

// InputRow is one row of inputs.parquet: one journaled input with the
// verdict the replay gives it.
type InputRow struct {
	Robot string `parquet:"robot,dict"`
	Run   string `parquet:"run,dict"`
	// Sequence is the robot's arrival sequence number, from 1.
	Sequence int64 `parquet:"sequence"`
	// ClientSequence is the client's own number for the sample.
	ClientSequence int64 `parquet:"client_sequence"`
	// ArrivalUnixNs is when the service received it, Unix nanoseconds (0
	// if not recorded).
	ArrivalUnixNs int64 `parquet:"arrival_unix_ns"`
	// Kind is odometry, heading, fix or reseed; FixKind is pose, position,
	// heading or landmark for a fix, else empty.
	Kind    string `parquet:"kind,dict"`
	FixKind string `parquet:"fix_kind,dict"`
	// StampNs is the sample's stamp (a fix's capture time), nanoseconds.
	StampNs int64 `parquet:"stamp_ns"`
	// SensorID names a fix's sensor, else empty.
	SensorID string `parquet:"sensor_id,dict"`
	// Verdict is the verdict given on arrival; FinalVerdict is what a held
	// fix became later (the same as Verdict for every other input, "held"
	// for one still held at the end of the journal).
	Verdict      string `parquet:"verdict,dict"`
	FinalVerdict string `parquet:"final_verdict,dict"`
	// NIS is a fix's normalised innovation squared on arrival, FinalNIS
	// the one of its final verdict; null when none was computed.
	NIS      *float64 `parquet:"nis,optional"`
	FinalNIS *float64 `parquet:"final_nis,optional"`
	// NISDimension is NIS's degrees of freedom (0: none).
	NISDimension int32 `parquet:"nis_dimension"`
	// Reason says why the input was refused, naming the field (final
	// reason for a held fix).
	Reason string `parquet:"reason"`
	// StatusCode is the google.rpc.Code of the outcome (0 OK).
	StatusCode int32 `parquet:"status_code"`
	// RecordedVerdict is the verdict the journal recorded on arrival.
	RecordedVerdict string `parquet:"recorded_verdict,dict"`
	// Events counts the events the input caused.
	Events int32 `parquet:"events"`
}

// PoseRow is one row of poses.parquet: the fused pose just after an
// input, as the replay computes it. x, y and heading are in the field
// frame; the covariance is over (x, y, heading).
type PoseRow struct {
	Robot string `parquet:"robot,dict"`
	Run   string `parquet:"run,dict"`
	// Sequence is the input's sequence number.
	Sequence int64 `parquet:"sequence"`
	// StampNs is the pose's stamp, the newest odometry stamp, nanoseconds.
	StampNs    int64   `parquet:"stamp_ns"`
	XM         float64 `parquet:"x_m"`
	YM         float64 `parquet:"y_m"`
	HeadingRad float64 `parquet:"heading_rad"`
	CovXXM2    float64 `parquet:"cov_xx_m2"`
	CovXYM2    float64 `parquet:"cov_xy_m2"`
	CovXHMRad  float64 `parquet:"cov_xh_m_rad"`
	CovYYM2    float64 `parquet:"cov_yy_m2"`
	CovYHMRad  float64 `parquet:"cov_yh_m_rad"`
	CovHHRad2  float64 `parquet:"cov_hh_rad2"`
	// Position95M is the 95% position ellipse's major semi-axis, metres;
	// HeadingStdRad the heading's standard deviation, radians.
	Position95M   float64 `parquet:"position95_m"`
	HeadingStdRad float64 `parquet:"heading_std_rad"`
	// ForwardMPerS, LeftMPerS and TurnRadPerS are the mean body velocity
	// over the last 50 ms of odometry.
	ForwardMPerS float64 `parquet:"forward_m_per_s"`
	LeftMPerS    float64 `parquet:"left_m_per_s"`
	TurnRadPerS  float64 `parquet:"turn_rad_per_s"`
	// IMUOffsetRad is the IMU's heading offset, radians, with its variance,
	// rad^2; IMUOffsetReady says it is known.
	IMUOffsetRad     float64 `parquet:"imu_offset_rad"`
	IMUOffsetVarRad2 float64 `parquet:"imu_offset_var_rad2"`
	IMUOffsetReady   bool    `parquet:"imu_offset_ready"`
	// Trusted says the pose can be trusted; Distrust lists the reasons it
	// cannot, as labels (position_uncertain, fix_disagrees, ...).
	Trusted  bool     `parquet:"trusted"`
	Distrust []string `parquet:"distrust,list"`
}

// EventRow is one row of events.parquet: a notable moment an input caused.
type EventRow struct {
	Robot string `parquet:"robot,dict"`
	Run   string `parquet:"run,dict"`
	// Sequence is the sequence number of the input that caused it.
	Sequence int64 `parquet:"sequence"`
	// Kind is the event's label (fix_refused, slip_suspected, odometry_gap,
	// move_recovered, trust_lost, trust_regained, reseeded).
	Kind string `parquet:"kind,dict"`
	// StampNs is when it happened on the robot's time base, nanoseconds.
	StampNs int64 `parquet:"stamp_ns"`
	// SensorID names the sensor concerned, if any.
	SensorID string `parquet:"sensor_id,dict"`
	// Value depends on Kind: a refused fix's NIS, a slip's residual
	// chi-square, a gap's length in seconds, a recovery's correction in
	// metres; 0 for the others.
	Value float64 `parquet:"value"`
	// Detail says more, for people (trust lost or regained: the reasons).
	Detail string `parquet:"detail"`
}
