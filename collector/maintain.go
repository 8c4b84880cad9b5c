package collector

import (
	"context"
	"errors"
	"fmt"
	"time"

	"github.com/classwatch/classwatch/windows"
)

// Maintain runs the join's jobs once, at time now, for every model the
// store knows, under its configured policy (Options.Defaults for a model
// not configured):
//
//   - with DefaultLabel and LabelTimeout: predictions unlabeled for
//     LabelTimeout get the default label, counted as result="implied", in
//     one store transaction;
//   - with EarlyLabelTTL: early labels received EarlyLabelTTL ago whose
//     prediction never came are dropped, counted as result="expired";
//   - with Retention: raw predictions in buckets that ended Retention ago
//     are dropped (cells stay).
//
// One model's failure does not stop the others; the errors are joined.
// When several replicas share a database, run Maintain on one of them.
func (c *Collector) Maintain(ctx context.Context, now time.Time) error {
	infos, err := c.store.Models(ctx)
	if err != nil {
		c.metrics.storeErrors.WithLabelValues("models").Inc()
		return fmt.Errorf("list models: %w", err)
	}
	var errs []error
	for _, info := range infos {
		if err := c.maintainModel(ctx, c.policyFor(info.Name), now); err != nil {
			errs = append(errs, fmt.Errorf("maintain model %s: %w", info.Name, err))
		}
		if ctx.Err() != nil {
			break
		}
	}
	if err := errors.Join(errs...); err != nil {
		return err
	}
	if err := ctx.Err(); err != nil {
		return err
	}
	c.metrics.maintenanceSuccess.Set(float64(now.UnixNano()) / 1e9)
	return nil
}

func (c *Collector) maintainModel(ctx context.Context, p ModelPolicy, now time.Time) error {
	var errs []error
	if p.DefaultLabel != "" && p.LabelTimeout > 0 {
		n, _, err := c.store.ApplyLabelTimeout(ctx, p.Name, p.DefaultLabel, p.LabelTimeout, now)
		if err != nil {
			c.metrics.storeErrors.WithLabelValues("apply_label_timeout").Inc()
			errs = append(errs, fmt.Errorf("apply label timeout: %w", err))
		} else if n > 0 {
			c.metrics.labelsReceived.WithLabelValues(p.Name, resultImplied).Add(float64(n))
		}
	}
	if p.EarlyLabelTTL > 0 {
		n, err := c.store.ExpireEarlyLabels(ctx, p.Name, p.EarlyLabelTTL, now)
		if err != nil {
			c.metrics.storeErrors.WithLabelValues("expire_early_labels").Inc()
			errs = append(errs, fmt.Errorf("expire early labels: %w", err))
		} else {
			if n > 0 {
				c.metrics.labelsReceived.WithLabelValues(p.Name, resultExpired).Add(float64(n))
			}
		}
	}
	if p.Retention > 0 {
		n, err := c.store.PurgeRaw(ctx, p.Name, retentionCutoff(p, now))
		if err != nil {
			c.metrics.storeErrors.WithLabelValues("purge_raw").Inc()
			errs = append(errs, fmt.Errorf("purge raw rows: %w", err))
		} else {
			if n > 0 {
				c.metrics.purged.WithLabelValues(p.Name).Add(float64(n))
			}
		}
	}
	return errors.Join(errs...)
}

// retentionCutoff is the start of the oldest bucket retention keeps at
// now: buckets starting before the bucket that holds now−Retention ended at
// or before now−Retention, so everything in them is older than the
// retention.
func retentionCutoff(p ModelPolicy, now time.Time) time.Time {
	return windows.BucketStart(now.Add(-p.Retention), p.Bucket)
}
