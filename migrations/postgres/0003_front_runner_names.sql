-- plumbline store on PostgreSQL, version 3: the top-ranked model is called the front-runner, and the
-- share of draws in which a model errs least the draw share. Events stored
-- before take the new kind names and keys, so that a filter by kind and a
-- reader of the details see one vocabulary. (Boards and watches stored as
-- JSON are read through serde aliases instead.)

UPDATE events SET kind = 'front_runner_changed' WHERE kind = 'leader_changed';
UPDATE events SET kind = 'front_runner_uncertain' WHERE kind = 'leader_uncertain';
UPDATE events SET kind = 'front_runner_settled' WHERE kind = 'leader_settled';
UPDATE events
   SET summary = REPLACE(summary, 'leader', 'front-runner'),
       details_json = REPLACE(details_json, '"leader"', '"front_runner"')
 WHERE kind LIKE 'front_runner_%';
