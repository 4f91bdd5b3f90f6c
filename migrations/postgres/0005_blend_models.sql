-- plumbline store on PostgreSQL, version 5: a registered blend is a model
-- whose predictions the service derives from other models' (ModelRegistry's
-- RegisterBlend). Its definition (members, weights, the board it was taken
-- from) is kept as JSON beside the model, so that a restart derives its
-- predictions again; NULL for a model whose predictions are sent.

ALTER TABLE models ADD COLUMN blend_json TEXT;
