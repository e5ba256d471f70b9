"""The workspace database schema (SQLite): photos, patches, label history, review state, jobs, split."""

SCHEMA = """
CREATE TABLE IF NOT EXISTS meta (key TEXT PRIMARY KEY, value TEXT NOT NULL);
CREATE TABLE IF NOT EXISTS photos (
    id INTEGER PRIMARY KEY,
    name TEXT NOT NULL UNIQUE,          -- path relative to the folder it was found in
    source_path TEXT NOT NULL,          -- absolute path at intake (updated when the file moves)
    size_bytes INTEGER NOT NULL,
    width INTEGER NOT NULL, height INTEGER NOT NULL,   -- upright (EXIF orientation applied)
    gsd_mm REAL,                        -- mm per pixel of the original photo, NULL if unknown
    gsd_source TEXT NOT NULL,           -- sidecar | sidecar-camera | option | option-camera | exif | none
    group_id TEXT NOT NULL,             -- structure / site (or the photo) keeping splits apart
    capture_date TEXT,                  -- YYYY-MM-DD from the sidecar, the name pattern or EXIF
    roi TEXT,                           -- region of interest as given, NULL for the whole photo
    sha256 TEXT NOT NULL,
    added_at REAL NOT NULL,
    grid_px INTEGER,                    -- side of the grid's boxes in photo pixels (NULL: older kits)
    first_patch INTEGER,                -- its patches' ids are first_patch..last_patch (tiled in
    last_patch INTEGER                  -- one transaction; NULL: job frames, older kits)
);
CREATE INDEX IF NOT EXISTS photos_sha ON photos(sha256);
CREATE TABLE IF NOT EXISTS patches (
    id INTEGER PRIMARY KEY,
    photo_id INTEGER NOT NULL REFERENCES photos(id),
    row INTEGER NOT NULL, col INTEGER NOT NULL,
    x0 INTEGER NOT NULL, y0 INTEGER NOT NULL, x1 INTEGER NOT NULL, y1 INTEGER NOT NULL,
    crop TEXT NOT NULL,                 -- crop file relative to the workspace; '' = none (cut
                                        -- on demand from the photo, trainkit.store.pixels)
    patch_mm REAL,                      -- surface width covered by the patch; NULL when it is
                                        -- (x1 - x0) * the photo's gsd_mm, or unknown
    focus REAL NOT NULL,                -- variance of the Laplacian of the grey crop
    clipped REAL NOT NULL,              -- fraction of grey pixels at <= 2 or >= 253
    flags TEXT NOT NULL DEFAULT '',     -- comma-separated quality flags
    review_skip INTEGER NOT NULL DEFAULT 0   -- 1: left out of the review queue (--skip-flagged)
);  -- one box per photo: tiling writes a photo's patches in its one transaction
-- Patches looked up by photo and box are those with a crop file (a job's cells): an index
-- over every patch would add about a sixth to an archive's rows, which need none.
CREATE INDEX IF NOT EXISTS patches_cropfile_photo ON patches(photo_id) WHERE crop != '';
CREATE TABLE IF NOT EXISTS label_events (
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    patch_id INTEGER NOT NULL REFERENCES patches(id),
    label TEXT,                         -- class name; NULL = unsure (kept out of training)
    reviewer TEXT NOT NULL,
    origin TEXT NOT NULL,               -- reviewer | file | suggestion | drawing (LABEL_ORIGINS)
    created_at REAL NOT NULL
);
CREATE INDEX IF NOT EXISTS label_events_patch ON label_events(patch_id, id);
CREATE TABLE IF NOT EXISTS review_skips (
    patch_id INTEGER NOT NULL REFERENCES patches(id),
    reviewer TEXT NOT NULL,
    created_at REAL NOT NULL,
    PRIMARY KEY (patch_id, reviewer)    -- skipped patches go to the end of that reviewer's queue
);
CREATE TABLE IF NOT EXISTS undone_label_events (
    id INTEGER PRIMARY KEY,             -- the label_events id the undo removed
    patch_id INTEGER NOT NULL, label TEXT, reviewer TEXT NOT NULL, origin TEXT NOT NULL,
    created_at REAL NOT NULL, undone_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS label_settlements (
    event_id INTEGER PRIMARY KEY REFERENCES label_events(id),  -- the settling label event
    settled_reviewers TEXT NOT NULL     -- comma-separated reviewers whose labels disagreed
);
CREATE TABLE IF NOT EXISTS jobs (
    name TEXT PRIMARY KEY,              -- a job's name (one sample of one scan)
    scan TEXT NOT NULL,                 -- the scan folder the cells were drawn from
    threshold REAL NOT NULL,            -- the model's screening threshold at the scan
    design TEXT NOT NULL,               -- JSON: strata sizes, sample sizes, band, seed
    created_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS job_cells (
    patch_id INTEGER PRIMARY KEY REFERENCES patches(id),
    job TEXT NOT NULL REFERENCES jobs(name),
    frame TEXT NOT NULL,                -- the frame's path as the scan recorded it
    stratum TEXT NOT NULL,              -- flagged | near | rest | rest-1 ... (jobs.design)
    inclusion_probability REAL NOT NULL,  -- n_h / N_h of its stratum, over every draw of the job
    screening_probability REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS job_verifications (  -- append-only: every check of a job is kept
    id INTEGER PRIMARY KEY AUTOINCREMENT,
    job TEXT NOT NULL REFERENCES jobs(name),
    created_at REAL NOT NULL,
    required_recall REAL,               -- the bound asked (verify --require-recall), NULL if none
    passed INTEGER,                     -- 1 accepted, 0 refused, NULL without a bound
    verdict TEXT NOT NULL,              -- the verdict in words
    model TEXT,                         -- the scanned model's path
    model_sha256 TEXT,                  -- SHA-256 of that file when checked
    record TEXT NOT NULL                -- JSON: figures, counts and the rest of the check
);
CREATE TABLE IF NOT EXISTS split_assignments (
    patch_id INTEGER PRIMARY KEY REFERENCES patches(id),
    subset TEXT NOT NULL CHECK (subset IN ('train', 'val', 'test'))
);
CREATE TABLE IF NOT EXISTS label_picks (  -- append-only: every pick of patches to label is kept
    pick INTEGER PRIMARY KEY,           -- the pick's number, 1, 2, ... in the order made
    seed INTEGER NOT NULL,
    model TEXT,                         -- the model that guided it (path), NULL for a spread pick
    design TEXT NOT NULL,               -- JSON: what was asked, the quotas, the pool and its rules
    created_at REAL NOT NULL
);
CREATE TABLE IF NOT EXISTS label_pick_patches (
    patch_id INTEGER PRIMARY KEY REFERENCES patches(id),  -- a patch is picked at most once
    pick INTEGER NOT NULL REFERENCES label_picks(pick),
    rank INTEGER NOT NULL,              -- 1 = the first to label in its pick
    reason TEXT NOT NULL,               -- spread | uncertain | diverse (PICK_REASONS)
    score REAL                          -- the model's margin (top-1 minus top-2), NULL for spread
);
CREATE INDEX IF NOT EXISTS label_pick_patches_order ON label_pick_patches(pick, rank);
CREATE TABLE IF NOT EXISTS drawing_measures (  -- what an imported crack drawing says of a patch
    patch_id INTEGER NOT NULL REFERENCES patches(id),
    drawing_sha256 TEXT NOT NULL,       -- SHA-256 of the drawing file (mask, SVG or CSV)
    drawing TEXT NOT NULL,              -- the drawing file as given at import
    kind TEXT NOT NULL,                 -- mask | svg | csv (DRAWING_KINDS)
    label TEXT,                         -- class by the patch label rule; NULL = ambiguous
    reason TEXT NOT NULL,               -- the rule's reason in words
    angle_deg REAL,                     -- dominant crack angle (taxonomy convention), NULL: none
    coherence REAL,                     -- doubled-angle resultant R in [0, 1], NULL: no crack
    boundary_deg REAL,                  -- angle's distance to a class boundary (oriented cracks)
    length_px REAL NOT NULL,            -- centreline length inside the patch, photo pixels
    width_px REAL,                      -- mean crack width along it, photo pixels; NULL: unknown
    width_max_px REAL,                  -- widest stretch of it, photo pixels; NULL: unknown
    event_id INTEGER,                   -- the label event this import added, NULL if none
    imported_at REAL NOT NULL,
    PRIMARY KEY (patch_id, drawing_sha256)  -- the latest row of a patch (largest rowid) counts
);
"""
