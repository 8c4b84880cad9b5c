package main

import (
	"errors"
	"fmt"

	"gopkg.in/yaml.v3"

	"github.com/classwatch/classwatch/alerts"
)

// parseAlerts decodes the alerts and notifiers sections with the alerts
// package's parsers, keeping what parses.
func (c *config) parseAlerts() error {
	rules, rerr := alerts.ParseRules(section(&c.Alerts))
	if rerr != nil {
		rerr = fmt.Errorf("alerts: %w", rerr)
	}
	notifiers, nerr := alerts.ParseNotifiers(section(&c.Notifiers))
	if nerr != nil {
		nerr = fmt.Errorf("notifiers: %w", nerr)
	}
	c.rules, c.notifiers = rules, notifiers
	return errors.Join(rerr, nerr)
}

// validateRuleWindows checks that each rule names a window some model has:
// the top-level windows or a model's own (README.md "Configuration").
func (c config) validateRuleWindows(p *problems) {
	if err := alerts.CheckWindows(c.rules, c.allWindows()); err != nil {
		p.errs = append(p.errs, fmt.Errorf("alerts: %w", err))
	}
}

// section returns a config section's node, or nil when the file lacks it.
func section(n *yaml.Node) *yaml.Node {
	if n.Kind == 0 {
		return nil
	}
	return n
}
